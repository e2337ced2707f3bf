"""The model card: nested frozen configs, strict keys, what may be left out (issue 12)."""

import dataclasses

import numpy as np
import pytest

from conftest import MODELS, card_dict
from monitor.base.errors import CardError
from monitor.features.card import FRONTEND_KEYS, card_from_dict, load_card
from monitor.features.frontend import FrontEnd
from monitor.features.stages import KINDS, NO_OFF, REQUIRED, STAGES, keys_of

# the switches that are off by default, and only they, may be left out (issue 12)
OPTIONAL = {"preemphasis", "center", "pad_mode", "window_in_frame", "log_floor", "db_ref",
            "top_db", "lifter", "window_symmetric", "pcm_bits", "arithmetic"}


def test_card_tables_are_nested_frozen_configs(demo_card):
    c = demo_card
    assert c.audio.sample_rate == c.sample_rate == 16000
    assert c.frontend.mel.mel_triangles == "mel" and c.frontend.framing.fft_length == 512
    assert c.frontend.dct is None  # the logmel kind runs no DCT stage
    assert c.scaling.mean.shape == (40,) and c.scaling.per_window == "none"
    with pytest.raises(dataclasses.FrozenInstanceError):
        c.frontend.mel.mel_bands = 64
    # the flat names older code reads
    assert (c.window_samples, c.hop_samples, c.frames_per_window, c.feature_shape) == \
        (16000, 8000, 98, (98, 40))
    assert (c.kind, c.layout, c.pcm_bits, c.bands, c.time_axis) == ("logmel", "time_mel", 16, 40, 0)


def test_only_the_off_switches_have_defaults():
    # a key without a default must be given when its stage runs; the ones with a default are
    # exactly the switches that are off by default (pad_mode needs center; mfcc/dct_norm need
    # kind = "mfcc")
    defaults = set()
    for st in STAGES.values():
        if st.config is None or st.name == "scaling":
            continue
        for name, k in keys_of(st.config).items():
            if k.default is not REQUIRED:
                defaults.add(name)
                assert k.off is not NO_OFF and k.default == k.off or name == "window_in_frame"
    assert defaults == OPTIONAL
    assert set(FRONTEND_KEYS) == OPTIONAL | {
        "kind", "frame_length", "frame_step", "fft_length", "window", "power", "mel_bands",
        "fmin", "fmax", "mel_scale", "mel_norm", "mel_triangles", "log", "log_offset", "mfcc",
        "dct_norm", "layout"}


def test_a_card_with_only_the_required_keys_equals_the_full_one(demo_card):
    raw = card_dict(frontend={"pcm_bits": None})  # pcm_bits 16 -> the default 0
    raw["frontend"] = {k: v for k, v in raw["frontend"].items() if k not in OPTIONAL}
    raw.pop("decision")
    c = card_from_dict(raw)
    assert c.frontend.pcm.pcm_bits == 0 and c.frontend.centre.center is False
    assert c.frontend.framing == demo_card.frontend.framing


# the demo card's mel keys removed: a spectrogram card may not carry them
NO_MEL = {name: None for name in keys_of(STAGES["mel"].config)}


@pytest.mark.parametrize("kind", list(KINDS))
def test_every_required_key_is_named_when_missing(kind):
    base = {"kind": kind, "mfcc": 13, "dct_norm": "ortho"} if kind == "mfcc" else {"kind": kind}
    if kind == "spectrogram":
        base.update(NO_MEL)
    raw = card_dict(frontend=base, scaling=None)
    if kind == "waveform":
        raw["frontend"] = {"kind": "waveform"}
    card = card_from_dict(raw)
    required = [k for k in card.frontend.settings() if k not in OPTIONAL and k != "kind"]
    assert (kind == "waveform") == (required == [])
    for name in required:
        broken = card_dict(frontend={**base, name: None}, scaling=None)
        with pytest.raises(CardError, match=rf"frontend\.{name} is missing: kind = \"{kind}\""):
            card_from_dict(broken)


def test_a_card_listing_every_key_at_its_default_loads():
    # a card may list every further key at its default beside kind = "logmel" (mfcc = 0,
    # dct_norm, lifter = 0 for a stage the kind does not run): those values change nothing
    raw = card_dict(frontend={"preemphasis": 0.0, "center": False, "pad_mode": "constant",
                              "window_in_frame": "start", "log_floor": 0.0, "db_ref": "one",
                              "top_db": 0.0, "mfcc": 0, "dct_norm": "ortho", "lifter": 0})
    raw["scaling"]["per_window"] = "none"
    c = card_from_dict(raw)
    np.testing.assert_array_equal(FrontEnd(c).batch(np.zeros((1, 16000), np.float32)),
                                  FrontEnd(load_card(MODELS / "demo.toml")).batch(
                                      np.zeros((1, 16000), np.float32)))


def _every_key_on():
    """A value for every [frontend] key that is not its off value (an mfcc card with every
    switch on)."""
    on = {"kind": "mfcc", "mfcc": 13, "dct_norm": "uniform", "lifter": 22.0, "center": True,
          "pad_mode": "reflect", "preemphasis": 0.97, "window_in_frame": "centre", "log": "db",
          "log_offset": 0.0, "log_floor": 1e-10, "db_ref": "max", "top_db": 80.0,
          "window_symmetric": True}
    return card_from_dict(card_dict(frontend=on, scaling=None)).frontend.settings()


def _base(kind):
    """The demo card as a card of `kind`, carrying only the keys of the stages it runs."""
    raw = card_dict(frontend={"kind": kind, **(NO_MEL if kind == "spectrogram" else {})},
                    scaling=None)
    if kind == "waveform":
        raw["frontend"] = {"kind": "waveform"}
    return raw


STRAY = [(kind, stage, name) for kind, used in KINDS.items() for stage in STAGES
         if stage not in used and stage != "scaling" for name in keys_of(STAGES[stage].config)]


@pytest.mark.parametrize("kind,stage,name", STRAY, ids=[f"{k}-{n}" for k, _, n in STRAY])
def test_a_key_of_a_stage_the_kind_does_not_run_is_refused(kind, stage, name):
    # DEVELOPERS.md: a card may carry for a stage its kind does not run only the key's off
    # value; any other value is refused, naming the key and the kind (and a key without an
    # off value is refused at every value)
    value = _every_key_on()[name]
    raw = _base(kind)
    card_from_dict(raw)  # the base card loads
    raw["frontend"][name] = value
    with pytest.raises(CardError, match=rf'frontend\.{name}=.* has no effect with '
                                        rf'kind = "{kind}" \(the {stage} stage runs in'):
        card_from_dict(raw)
    off = keys_of(STAGES[stage].config)[name].off
    if off is not NO_OFF:
        raw["frontend"][name] = off
        assert card_from_dict(raw).kind == kind


def test_same_front_end_and_settings_dict(demo_card):
    other = card_from_dict(card_dict(classes=["a", "b", "c", "d"]))
    assert demo_card.same_front_end(other)
    assert not demo_card.same_front_end(card_from_dict(card_dict(frontend={"preemphasis": 0.5})))
    assert not demo_card.same_front_end(card_from_dict(card_dict(scaling=None)))
    d = demo_card.settings_dict()
    assert d["classes"] == list(demo_card.classes) and d["audio"]["hop_s"] == 0.5
    assert d["frontend"]["mel_triangles"] == "mel" and d["frontend"]["center"] is False
    assert "mfcc" not in d["frontend"]  # the keys of the stages the kind runs
    assert len(d["scaling"]["mean"]) == 40 and d["scaling"]["per_window"] == "none"


@pytest.mark.parametrize("changes,shape", [
    ({"center": True, "pad_mode": "constant"}, (101, 40)),
    ({"window_in_frame": "centre"}, (97, 40)),
    ({"kind": "mfcc", "mfcc": 13, "dct_norm": "ortho"}, (98, 13)),
    ({"kind": "spectrogram", "layout": "mel_time", **NO_MEL}, (257, 98)),
])
def test_feature_shapes(changes, shape):
    # librosa.stft's frame counts: 1 + (16000 + 512 - 512) // 160 = 101 with center=True and
    # 1 + (16000 - 512) // 160 = 97 with win_length < n_fft (computed)
    assert card_from_dict(card_dict(frontend=changes, scaling=None)).feature_shape == shape


def test_scaling_npz_is_read(tmp_path):
    np.savez(tmp_path / "s.npz", mean=np.full(40, 0.5), std=np.full(40, 2.0))
    raw = card_dict(scaling={"mean": "s.npz", "std": "s.npz", "per_window": "standardise"})
    c = card_from_dict(raw, tmp_path / "m.toml")
    assert float(c.mean[0]) == 0.5 and c.scaling.per_window == "standardise"


def test_the_readme_lists_every_card_key():
    # the README's card listing names every key of every table, and says which are required
    from monitor.features.card import _TABLES

    text = (MODELS.parent / "README.md").read_text()
    listing = text[text.index("## The model card"):text.index("### When the numbers differ")]
    for table, keys in _TABLES.items():
        for name in keys:
            assert f"\n{name} = " in listing, f"{table}.{name} is not in the README's card"
    for name in OPTIONAL | {"per_window"}:
        assert f"{name}`" in listing.split("**May be left out**")[1].split("\n-")[0], name
