"""Bundled sample recording (an invented four-port delay task), installed as
``attractorfit.sample_data`` so that ``attractorfit demo`` finds it anywhere.
Regenerate with ``python examples/make_demo_data.py``."""
