"""The live stats keep a bounded latency histogram; its percentiles agree with
numpy.percentile (reference) to the 1 ms bin."""
from __future__ import annotations

import numpy as np

from limner.runtime.live_loop import LATENCY_BINS, LiveStats


def test_latency_percentiles_match_numpy_within_one_bin():
    rng = np.random.default_rng(0)
    ms = rng.gamma(4.0, 8.0, 20_000)  # a skewed latency distribution, 5..150 ms
    st = LiveStats()
    for v in ms:
        st.add_latency(float(v))
    for q in (50, 95, 99):
        assert abs(st.p(q) - np.percentile(ms, q)) <= 1.0, q
    assert st.latency_hist.size == LATENCY_BINS and len(st.recent_ms) == 300  # bounded memory
    assert LiveStats().p(95) == 0.0
