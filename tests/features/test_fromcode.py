"""`scenemon card write`: a card from the training code's own calls, checked against the
libraries that make those features (librosa, TensorFlow's tf.signal) and torchaudio's
documented formulas (torchaudio itself does not install beside this PyTorch build)."""

import numpy as np
import pytest
import soundfile as sf

from conftest import cli

librosa = pytest.importorskip("librosa")
CLASSES = "quiet_room,voices,traffic,machinery"


@pytest.fixture(scope="module")
def walk(tour, tmp_path_factory):
    d = tmp_path_factory.mktemp("fromcode")
    x, _ = sf.read(str(tour[0]), dtype="float32")
    sf.write(str(d / "walk.wav"), x[: 60 * 16000], 16000, subtype="PCM_16")
    w, _ = sf.read(str(d / "walk.wav"), dtype="float32", start=16000 * 40, frames=16000)
    return d, w


def write(d, name, *calls, extra=()):
    args = ["card", "write", d / name]
    for c in calls:
        args += ["--call", c]
    return cli(*args, "--classes", CLASSES, "--window-seconds", "1", "--hop-seconds", "0.5",
               *extra)


@pytest.mark.parametrize("ref, top_db, center", [("1.0", "None", "True"),
                                                 ("np.max", "80.0", "True"),
                                                 ("1.0", "60", "False")])
def test_librosa_calls_make_a_card_that_matches_librosa(walk, ref, top_db, center):
    d, w = walk
    s = librosa.feature.melspectrogram(y=w, sr=16000, n_fft=512, hop_length=160, win_length=400,
                                       n_mels=40, fmax=8000.0, center=center == "True")
    feats = librosa.power_to_db(s, ref=np.max if ref == "np.max" else 1.0,
                                top_db=None if top_db == "None" else float(top_db)).T
    name = f"lib-{ref}-{top_db}-{center}".replace(".", "")
    np.save(d / f"{name}.npy", feats)
    r = write(d, f"{name}.toml",
              f"librosa.feature.melspectrogram(y=y, sr=16000, n_fft=512, hop_length=160, "
              f"win_length=400, n_mels=40, fmax=8000, center={center})",
              f"librosa.power_to_db(S, ref={ref}, top_db={top_db})",
              extra=["--check", d / "walk.wav", d / f"{name}.npy", "--start", "40"])
    assert r.returncode == 0 and ": match" in r.stdout, r.stdout + r.stderr


def test_librosa_mfcc_with_a_scaler(walk):
    from sklearn.preprocessing import StandardScaler

    d, w = walk
    feats = librosa.feature.mfcc(y=w, sr=16000, n_mfcc=13, n_fft=512, hop_length=160,
                                 n_mels=40).T
    np.save(d / "mfcc.npy", feats)
    sc = StandardScaler().fit(feats)
    np.savez(d / "scaler.npz", mean_=sc.mean_, scale_=sc.scale_)
    r = write(d, "mfcc.toml", "librosa.feature.mfcc(y=y, sr=16000, n_mfcc=13, n_fft=512, "
              "hop_length=160, n_mels=40)", extra=["--scaler", d / "scaler.npz", "--check",
                                                   d / "walk.wav", d / "mfcc.npy", "--start",
                                                   "40"])
    assert r.returncode == 0 and ": match" in r.stdout, r.stdout + r.stderr
    text = (d / "mfcc.toml").read_text()
    assert 'mean = "mfcc.scaling.npz"' in text and "mfcc = 13" in text
    saved = np.load(d / "mfcc.scaling.npz")
    np.testing.assert_array_equal(saved["mean"], sc.mean_.astype(np.float32))


def test_tf_signal_calls_make_a_card_that_matches_tensorflow(walk):
    tf = pytest.importorskip("tensorflow")
    d, w = walk
    stft = tf.signal.stft(w, frame_length=400, frame_step=160, fft_length=512)
    mag = tf.abs(stft)
    m = tf.signal.linear_to_mel_weight_matrix(num_mel_bins=40, num_spectrogram_bins=257,
                                              sample_rate=16000, lower_edge_hertz=20.0,
                                              upper_edge_hertz=8000.0)
    feats = tf.math.log(tf.tensordot(mag, m, 1) + 1e-6).numpy()
    np.save(d / "tf.npy", feats)
    r = write(d, "tf.toml",
              "tf.abs(tf.signal.stft(signals, frame_length=400, frame_step=160, fft_length=512))",
              "tf.signal.linear_to_mel_weight_matrix(num_mel_bins=40, num_spectrogram_bins=257, "
              "sample_rate=16000, lower_edge_hertz=20.0, upper_edge_hertz=8000.0)",
              "tf.math.log(mel_spectrograms + 1e-6)",
              extra=["--check", d / "walk.wav", d / "tf.npy", "--start", "40"])
    assert r.returncode == 0 and ": match" in r.stdout, r.stdout + r.stderr


def torchaudio_logmel(w, *, n_fft, hop, n_mels, top_db):
    """torchaudio.transforms.MelSpectrogram then AmplitudeToDB("power"), by the formulas
    torchaudio documents (torch.stft with a periodic Hann window, center=True and
    pad_mode="reflect"; melscale_fbanks with the HTK scale, triangles over the FFT bins'
    frequencies, norm None; 10 log10(max(x, 1e-10)), then top_db below the maximum), written
    here with torch's own STFT (from memory of torchaudio's source)."""
    torch = pytest.importorskip("torch")
    x = torch.from_numpy(w.astype(np.float32))
    spec = torch.stft(x, n_fft, hop_length=hop, win_length=n_fft,
                      window=torch.hann_window(n_fft), center=True, pad_mode="reflect",
                      return_complex=True).abs() ** 2
    n_freqs = n_fft // 2 + 1
    all_freqs = torch.linspace(0, 16000 // 2, n_freqs)
    mel = lambda f: 2595.0 * np.log10(1.0 + f / 700.0)  # noqa: E731 - HTK
    m_pts = torch.linspace(mel(0.0), mel(8000.0), n_mels + 2)
    f_pts = 700.0 * (10 ** (m_pts / 2595.0) - 1.0)
    f_diff = f_pts[1:] - f_pts[:-1]
    slopes = f_pts.unsqueeze(0) - all_freqs.unsqueeze(1)
    down = (-1.0 * slopes[:, :-2]) / f_diff[:-1]
    up = slopes[:, 2:] / f_diff[1:]
    fb = torch.clamp(torch.min(down, up), min=0.0)
    mel_spec = (spec.T @ fb).T  # (n_mels, time)
    db = 10.0 * torch.log10(torch.clamp(mel_spec, min=1e-10))
    if top_db is not None:
        db = torch.maximum(db, db.max() - top_db)
    return db.numpy()


def test_torchaudio_calls_make_a_card_of_torchaudios_conventions(walk):
    d, w = walk
    np.save(d / "ta.npy", torchaudio_logmel(w, n_fft=512, hop=160, n_mels=40, top_db=80.0))
    r = write(d, "ta.toml",
              "torchaudio.transforms.MelSpectrogram(sample_rate=16000, n_fft=512, "
              "hop_length=160, n_mels=40)", "torchaudio.transforms.AmplitudeToDB(top_db=80)",
              extra=["--check", d / "walk.wav", d / "ta.npy", "--start", "40"])
    assert r.returncode == 0 and ": match" in r.stdout, r.stdout + r.stderr
    text = (d / "ta.toml").read_text()
    assert 'pad_mode = "reflect"' in text and 'mel_scale = "htk"' in text
    assert 'layout = "mel_time"' in text


def test_what_card_write_cannot_read_is_said_in_one_sentence(walk):
    d, _ = walk
    r = write(d, "bad.toml", "librosa.feature.melspectrogram(y=y, sr=sr, n_fft=512)",
              "librosa.power_to_db(S)")
    assert r.returncode == 2 and "sr= is written as a name" in r.stderr
    assert "--sample-rate" in r.stderr and not (d / "bad.toml").exists()
    r = write(d, "named.toml", "librosa.feature.melspectrogram(y=y, sr=sr, n_fft=512)",
              "librosa.power_to_db(S)", extra=["--sample-rate", "16000"])
    assert r.returncode == 0 and "sample_rate = 16000" in (d / "named.toml").read_text()
    r = write(d, "bad.toml", "librosa.feature.melspectrogram(y=y, sr=16000, n_mels=bands)",
              "librosa.power_to_db(S)")
    assert r.returncode == 2 and "n_mels=bands is not a value" in r.stderr
    r = write(d, "bad.toml", "my_features(y)")
    assert r.returncode == 2 and "my_features is not a feature call" not in r.stderr
    assert "none of my_features is a feature call" in r.stderr
    (d / "exists.toml").write_text("x")
    r = write(d, "exists.toml", "librosa.feature.mfcc(y=y, sr=16000)")
    assert r.returncode == 2 and "writes over nothing" in r.stderr
    import pickle

    with open(d / "s.pkl", "wb") as f:
        pickle.dump({"a": 1}, f)
    r = write(d, "p.toml", "librosa.feature.mfcc(y=y, sr=16000)", extra=["--scaler", d / "s.pkl"])
    assert r.returncode == 2 and "--trust-pickle" in r.stderr
    assert not (d / "p.toml").exists()
