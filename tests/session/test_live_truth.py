"""Truth told live (monitor/session/truth.py, `LiveTruth`): a window's label is the one the
spans told so far give it under the file truth's rule (`TruthTrack.label_for`: the label
covering at least half of the window; the rule is this project's own, the README's
`windows.jsonl` field `truth`), whatever was told and when; with nothing told, every window
is unlabelled.
"""

from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.session.truth import LiveTruth, Span, TruthTrack

CLASSES = ("quiet_room", "kettle", "door")


def test_nothing_told_leaves_every_window_unlabelled():
    live = LiveTruth(CLASSES)
    assert [live.label_for(k * 0.5, k * 0.5 + 1.0) for k in range(50)] == [None] * 50
    assert live.spans(end_t=25.0) == []


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(0.0, 30.0), st.sampled_from((*CLASSES, None))),
                max_size=8),
       st.floats(0.0, 40.0))
def test_a_window_gets_the_label_the_told_spans_give_it(presses, t0):
    live = LiveTruth(CLASSES)
    for t, label in sorted(presses, key=lambda p: p[0]):
        live.set(label, t)
    t1 = t0 + 1.0
    expected = TruthTrack(live.spans(end_t=t1)).label_for(t0, t1)
    assert live.label_for(t0, t1) == expected
    if not presses or all(label is None for _, label in presses):
        assert expected is None


def test_the_open_span_counts_up_to_the_window_end():
    live = LiveTruth(CLASSES)
    live.set("kettle", 2.0)
    assert live.label_for(1.0, 2.0) is None  # told after this window
    assert live.label_for(2.0, 3.0) == "kettle"
    live.set(None, 3.2)
    assert live.spans() == [Span(2.0, 3.2, "kettle")]
    assert live.label_for(3.0, 4.0) is None  # 0.2 s of 1 s covered
