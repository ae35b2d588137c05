"""The run's warnings folded for a reader: our own plumbing."""

import io
import logging
import warnings

import numpy as np
from sklearn.exceptions import ConvergenceWarning

from attractorfit._notices import (NoticeBook, SurrogateWarning, capture,
                                   fold_surrogate_warnings, message_key)
from attractorfit.errors import InputWarning
from attractorfit.recording import Recording


def test_repeats_that_differ_only_in_numbers_fold():
    a = "rec.nwb: 27 unit(s) fire below 0.5 Hz (first: '1', 0.05 Hz)"
    b = "rec.nwb: 27 unit(s) fire below 0.5 Hz (first: '1', 0.0521 Hz)"
    assert message_key(a) == message_key(b)
    assert message_key(a) != message_key("rec.nwb: 3 unit(s) have fewer than 20 spikes")


def test_capture_shows_data_warnings_once_and_folds_the_rest():
    book, err = NoticeBook(), io.StringIO()
    with capture(book, err):
        for k in range(3):
            warnings.warn(f"rec.nwb: {k + 1} unit(s) are slow", InputWarning)
        for k in range(5):
            warnings.warn(f"EM did not converge (gain {k}e-3)", ConvergenceWarning)
        warnings.warn("fitted-network: 2 unit(s) are quiet (in 3 of 4 surrogates)",
                      SurrogateWarning)
        logging.getLogger("attractorfit").info("fitting the network")
    shown = err.getvalue().splitlines()
    assert shown == ["attractorfit: warning: rec.nwb: 1 unit(s) are slow"]
    closing = book.closing_lines()
    assert len(closing) == 1 and "5 times" in closing[0] and "EM did not converge" in closing[0]
    log = book.log_text()
    assert "fitting the network" in log and "fitted-network" in log
    assert "repeated 3 times in all: rec.nwb" in log


def test_surrogate_remarks_are_counted_over_surrogates():
    def rec(n_spikes):
        r = Recording(unit_ids=["a"], spike_times=[np.arange(n_spikes) * 0.1 + 0.05],
                      metadata={"source": "fitted-network"})
        r.warnings = list(r._quality_warnings())
        return r

    lines = fold_surrogate_warnings([rec(3), rec(5), rec(50)])
    assert lines == ["fitted-network: 1 unit(s) have fewer than 20 spikes (first: 'a') "
                     "(in 2 of 3 surrogates)"]
