"""A window's JSON line, put together directly, is the text the JSON encoder makes of it."""

import dataclasses
import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.decisions.contract import WindowResult

finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
anyfloat = st.floats(width=64)  # NaN and infinity too: those lines take the encoder's path
label = st.one_of(st.none(), st.text(max_size=12))


@settings(max_examples=300, deadline=None, derandomize=True)
@given(i=st.integers(0, 10**9), t0=finite, t1=finite, level=anyfloat, clipped=finite,
       ms=finite, gap=st.integers(0, 10**9), n=st.integers(1, 6), seed=st.integers(0, 2**16),
       top=label, decision=label, truth=label, latency=st.one_of(st.none(), anyfloat),
       novelty=st.one_of(st.none(), anyfloat), unfamiliar=st.booleans(),
       fault=st.one_of(st.none(), st.text(max_size=8)), none_probs=st.booleans(),
       odd=st.sampled_from([None, np.float32(0.5), np.nan]))
def test_quick_line_is_the_encoders_text(i, t0, t1, level, clipped, ms, gap, n, seed, top,
                                         decision, truth, latency, novelty, unfamiliar, fault,
                                         none_probs, odd):
    rng = np.random.default_rng(seed)
    probs = None if none_probs else rng.dirichlet(np.ones(n)).astype(np.float32)
    smoothed = None if none_probs else rng.dirichlet(np.ones(n))
    if odd is not None and probs is not None:
        probs[0] = odd  # a value the line cannot carry as it is (NaN), or a float32 one
    r = WindowResult(i=i, start=0, t0=t0, t1=t1, probs=probs, smoothed=smoothed, top=top,
                     decision=decision, truth=truth, level_dbfs=level, clipped=clipped,
                     gap=gap, ms=ms, latency_ms=latency, novelty=novelty,
                     unfamiliar=unfamiliar if novelty is not None else None, fault=fault)
    quick = dataclasses.replace(r).json_line()
    slow = dataclasses.replace(r)
    slow.record()  # with its record made first, the line is the JSON encoder's (json.dumps)
    assert quick == slow.json_line()
    json.loads(quick, parse_constant=_refuse)  # and it is JSON (RFC 8259): no NaN


def _refuse(constant):
    raise AssertionError(f"{constant} is not JSON (RFC 8259)")


def test_a_usual_line_takes_the_quick_way():
    r = WindowResult(i=3, start=24000, t0=1.5, t1=2.5, probs=np.float32([0.7, 0.2, 0.1]),
                     smoothed=np.array([0.6, 0.3, 0.1]), top="voices", decision=None,
                     truth="traffic", level_dbfs=-31.25, clipped=0.0, gap=0, ms=0.41,
                     novelty=2.5, unfamiliar=False)
    assert r._quick_line() == json.dumps({  # the standard library's encoder, key for key
        "i": 3, "t0": 1.5, "t1": 2.5, "probs": [round(float(v), 6) for v in r.probs],
        "smoothed": [0.6, 0.3, 0.1], "top": "voices", "decision": None, "truth": "traffic",
        "level_dbfs": -31.25, "clipped": 0.0, "gap": 0, "ms": 0.41, "novelty": 2.5,
        "unfamiliar": False}) + "\n"

