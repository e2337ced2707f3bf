"""Scalers as training code saves them: a full-shape scaler saved flat (scikit-learn's
StandardScaler on flattened windows gives (frames * bands,) arrays) is read in the model's
input order; an .npz with other array names says which arrays it holds. Failed before its
fix ("40 per frame", a raw KeyError)."""

import numpy as np
import pytest

from conftest import card_dict


def _card(tmp_path, mean, std, name="scale.npz", **arrays):
    from monitor.features.card import card_from_dict

    np.savez(tmp_path / name, **(arrays or {"mean": mean, "std": std}))
    raw = card_dict(scaling={"mean": name, "std": name})
    return card_from_dict(raw, tmp_path / "c.toml")


def test_a_flat_full_shape_scaler_is_read_in_the_models_input_order(tmp_path):
    shape = (98, 40)  # the demo card: frames x mel bands
    rng = np.random.default_rng(0)
    mean = rng.standard_normal(shape).astype(np.float32)
    std = (1.0 + rng.random(shape)).astype(np.float32)
    flat = _card(tmp_path, mean.reshape(-1), std.reshape(-1))
    full = _card(tmp_path, mean, std, name="full.npz")
    np.testing.assert_array_equal(flat.scaling.mean, full.scaling.mean)
    np.testing.assert_array_equal(flat.scaling.std, full.scaling.std)


def test_a_scaler_of_another_size_names_the_sizes_accepted(tmp_path):
    from monitor.base.errors import CardError

    with pytest.raises(CardError, match=r"one per band, the full shape \(98, 40\), or all 3920"):
        _card(tmp_path, np.zeros(100), np.ones(100))


def test_an_npz_with_other_array_names_names_them(tmp_path):
    from monitor.base.errors import CardError

    with pytest.raises(CardError, match=r"holds 'mean_', 'scale_', not arrays 'mean' and 'std'"):
        _card(tmp_path, None, None, mean_=np.zeros(40), scale_=np.ones(40))
