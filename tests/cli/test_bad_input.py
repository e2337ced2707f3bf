"""Bad input: exit code 2, one sentence naming the file and the problem, no traceback, and
no session left looking complete."""

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, cli, run_cli, write_wav

CARD = (MODELS / "demo.toml").read_text()


def card_with(tmp_path, old, new, name="bad.toml"):
    assert old in CARD
    p = tmp_path / name
    p.write_text(CARD.replace(old, new, 1))
    return p


def _good(tmp_path):
    return write_wav(tmp_path / "ok.wav", np.random.default_rng(1).standard_normal(32000) * 0.05)


def case_missing(tmp_path):
    return ["replay", tmp_path / "nope.wav"], "nope.wav", "not found"


def case_empty(tmp_path):
    (tmp_path / "empty.wav").write_bytes(b"")
    return ["replay", tmp_path / "empty.wav"], "empty.wav", "empty"


def case_corrupt(tmp_path):
    (tmp_path / "junk.wav").write_bytes(np.random.default_rng(0).bytes(5000))
    return ["replay", tmp_path / "junk.wav"], "junk.wav", "not a readable audio file"


def case_header_only(tmp_path):
    sf.write(str(tmp_path / "h.wav"), np.zeros(0, np.float32), 16000)
    return ["replay", tmp_path / "h.wav"], "h.wav", "no audio"


def case_directory(tmp_path):
    (tmp_path / "dir.wav").mkdir()
    return ["replay", tmp_path / "dir.wav"], "dir.wav", "is a directory"


def case_low_rate(tmp_path):
    write_wav(tmp_path / "8k.wav", np.zeros(16000), sr=8000)
    return ["replay", tmp_path / "8k.wav"], "8k.wav", "below the model's 16000 Hz"


def case_nan(tmp_path):
    x = np.zeros(32000, np.float32)
    x[20000] = np.nan
    sf.write(str(tmp_path / "nan.wav"), x, 16000, subtype="FLOAT")
    return ["replay", tmp_path / "nan.wav"], "nan.wav", "NaN or infinite samples"


def case_inf(tmp_path):
    x = np.zeros(32000, np.float32)
    x[100] = np.inf
    sf.write(str(tmp_path / "inf.wav"), x, 16000, subtype="FLOAT")
    return ["replay", tmp_path / "inf.wav"], "inf.wav", "NaN or infinite"


def case_too_short(tmp_path):
    write_wav(tmp_path / "short.wav", np.zeros(8000))
    return ["replay", tmp_path / "short.wav"], "short.wav", "shorter than one"


def case_card_no_classes(tmp_path):
    p = card_with(tmp_path, 'classes = ["quiet_room", "voices", "traffic", "machinery"]', "")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "classes is missing"


def case_card_duplicate_classes(tmp_path):
    p = card_with(tmp_path, '"traffic", "machinery"]', '"traffic", "traffic"]')
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "more than once"


def case_card_fmax(tmp_path):
    p = card_with(tmp_path, "fmax = 8000.0", "fmax = 9000.0")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "fmax=9000.0 is above the Nyquist"


def case_card_frame_length(tmp_path):
    p = card_with(tmp_path, "frame_length = 400", "frame_length = 600")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "must not exceed fft_length"


def case_card_negative_hop(tmp_path):
    p = card_with(tmp_path, "hop_s = 0.5", "hop_s = -0.5")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "hop_s=-0.5 must be a number > 0"


def case_card_zero_hop(tmp_path):
    p = card_with(tmp_path, "hop_s = 0.5", "hop_s = 0")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "hop_s=0.0 must be a number > 0"


def case_card_fractional_window(tmp_path):
    p = card_with(tmp_path, "window_s = 1.0", "window_s = 1.00001")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "not a whole number of samples"


def case_card_invalid_toml(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("classes = [\n")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "not valid TOML"


def case_card_scaling_length(tmp_path):
    p = card_with(tmp_path, "std = [", "std = [1.0, ")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "scaling.std has 41 values"


def case_card_missing(tmp_path):
    (tmp_path / "m.tflite").write_bytes((MODELS / "demo.tflite").read_bytes())
    return (["replay", _good(tmp_path), "--model", tmp_path / "m.tflite"], "m.tflite",
            "no model card")


def case_model_shape(tmp_path):
    p = card_with(tmp_path, "frame_step = 160", "frame_step = 320")
    return ["replay", _good(tmp_path), "--card", p], "demo.tflite", "gives 49 frames x 40 bands"


def case_model_truncated(tmp_path):
    m = tmp_path / "t.tflite"
    m.write_bytes((MODELS / "demo.tflite").read_bytes()[:2000])
    (tmp_path / "t.toml").write_text(CARD)
    return ["replay", _good(tmp_path), "--model", m], "t.tflite", "cannot be loaded"


def case_model_extension(tmp_path):
    m = tmp_path / "m.pt"
    m.write_bytes(b"x" * 10)
    (tmp_path / "m.toml").write_text(CARD)
    return ["replay", _good(tmp_path), "--model", m], "m.pt", "unknown model type"


def case_onnx_not_onnx(tmp_path):
    m = tmp_path / "m.onnx"
    m.write_bytes(b"x" * 10)
    (tmp_path / "m.toml").write_text(CARD)
    return ["replay", _good(tmp_path), "--model", m], "m.onnx", "not an ONNX model file"


def case_onnx_damaged(tmp_path):
    m = tmp_path / "m.onnx"
    m.write_bytes(b"\x08\x09" + b"\xff" * 64)  # an ir_version field, then nothing sensible
    (tmp_path / "m.toml").write_text(CARD)
    return ["replay", _good(tmp_path), "--model", m], "m.onnx", "cannot be loaded as an ONNX"


def case_truth_overlap(tmp_path):
    t = tmp_path / "t.tsv"
    t.write_text("0\t1.5\tvoices\n1.0\t2.0\ttraffic\n")
    return ["replay", _good(tmp_path), "--truth", t], "t.tsv", "spans overlap"


def case_truth_unknown_label(tmp_path):
    t = tmp_path / "t.tsv"
    t.write_text("0\t2.0\tkitchen\n")
    return ["replay", _good(tmp_path), "--truth", t], "t.tsv", "'kitchen', which is not one"


def case_truth_negative(tmp_path):
    t = tmp_path / "t.tsv"
    t.write_text("-1\t2.0\tvoices\n")
    return ["replay", _good(tmp_path), "--truth", t], "t.tsv", "negative time"


def case_bad_flag(tmp_path):
    return ["replay", _good(tmp_path), "--enter", "1.5"], "--enter", "not a fraction in [0, 1]"


def case_wrong_extension(tmp_path):
    (tmp_path / "song.mp3").write_bytes(b"ID3" + np.random.default_rng(2).bytes(3000))
    # libsndfile says "does not exist ... possibly a pipe?" of such a file: not what is wrong
    return ["replay", tmp_path / "song.mp3"], "song.mp3", "its content is not audio"


def case_card_class_count(tmp_path):
    p = card_with(tmp_path, '"traffic", "machinery"]', '"traffic"]')
    return ["replay", _good(tmp_path), "--card", p], "demo.tflite", "4 outputs but the card"


def case_card_power(tmp_path):
    p = card_with(tmp_path, "power = 2.0", "power = 3.0")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "power=3.0 must be 1 or 2"


def case_card_signal_magnitude(tmp_path):
    p = card_with(tmp_path, "power = 2.0", 'power = 1.0\narithmetic = "micro-signal"')
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "set power = 2, not 1"


def case_card_choice(tmp_path):
    p = card_with(tmp_path, 'mel_scale = "htk"', 'mel_scale = "bark"')
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "must be one of htk, slaney"


def case_model_random_bytes(tmp_path):
    m = tmp_path / "r.tflite"
    m.write_bytes(np.random.default_rng(5).bytes(8192))
    (tmp_path / "r.toml").write_text(CARD)
    return ["replay", _good(tmp_path), "--model", m], "r.tflite", "not a TFLite model file"


# --- the card rules (issue 12): unknown keys, missing keys, combinations, sizes -------------
def case_card_unknown_frontend_key(tmp_path):
    p = card_with(tmp_path, 'mel_scale = "htk"', 'mel_sclae = "htk"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "frontend.mel_sclae is not a card key; did you mean mel_scale?")


def case_card_unknown_top_key(tmp_path):
    p = card_with(tmp_path, "[audio]", "colour = 3\n\n[audio]")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "colour is not a card key"


def case_card_unknown_scaling_key(tmp_path):
    p = card_with(tmp_path, "[scaling]  # per mel band, from the training features",
                  '[scaling]\nper_windw = "standardise"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "scaling.per_windw is not a card key; did you mean per_window?")


def case_card_missing_triangles(tmp_path):
    p = card_with(tmp_path, 'mel_triangles = "mel"\n', "")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.mel_triangles is missing: kind = "logmel" needs it and it has no default '
            "(one of hz, mel)")


def case_card_missing_sample_rate(tmp_path):
    p = card_with(tmp_path, "sample_rate = 16000\n", "")
    return ["replay", _good(tmp_path), "--card", p], "bad.toml", "audio.sample_rate is missing"


def case_card_center_without_pad_mode(tmp_path):
    p = card_with(tmp_path, "pcm_bits = 16", "pcm_bits = 16\ncenter = true")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "frontend.pad_mode is missing: center = true needs it")


def case_card_pad_mode_without_center(tmp_path):
    p = card_with(tmp_path, "pcm_bits = 16", 'pcm_bits = 16\npad_mode = "reflect"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.pad_mode="reflect" needs center = true')


def case_card_top_db_without_db(tmp_path):
    p = card_with(tmp_path, "pcm_bits = 16", "pcm_bits = 16\ntop_db = 80.0")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.top_db=80.0 needs log = "db"')


def case_card_db_ref_without_db(tmp_path):
    p = card_with(tmp_path, "pcm_bits = 16", 'pcm_bits = 16\ndb_ref = "max"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.db_ref="max" needs log = "db"')


def case_card_lifter_without_mfcc(tmp_path):
    p = card_with(tmp_path, "pcm_bits = 16", "pcm_bits = 16\nlifter = 22")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.lifter=22 has no effect with kind = "logmel"')


def case_card_mel_bands_on_a_spectrogram(tmp_path):
    # the demo card's mel keys left in a spectrogram card: its kind runs no mel stage
    p = card_with(tmp_path, 'kind = "logmel"', 'kind = "spectrogram"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.mel_bands=40 has no effect with kind = "spectrogram" (the mel stage runs '
            'in kind "logmel", "mfcc"); remove it')


def case_card_window_on_a_waveform(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text('classes = ["a", "b"]\n\n[audio]\nsample_rate = 16000\nwindow_s = 1.0\n'
                 'hop_s = 0.5\n\n[frontend]\nkind = "waveform"\nwindow = "hann"\n')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.window="hann" has no effect with kind = "waveform"')


def case_card_dct_norm_uniform_on_logmel(tmp_path):
    # "ortho" is the off value a card at the defaults may carry; "uniform" is refused
    p = card_with(tmp_path, "pcm_bits = 16", 'pcm_bits = 16\ndct_norm = "uniform"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.dct_norm="uniform" has no effect with kind = "logmel" (the dct stage runs '
            'in kind "mfcc"); remove it or set it to "ortho"')


def case_card_mfcc_over_mel_bands(tmp_path):
    p = card_with(tmp_path, 'kind = "logmel"', 'kind = "mfcc"\nmfcc = 50\ndct_norm = "ortho"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "frontend.mfcc=50 must not exceed mel_bands=40")


def case_card_mfcc_missing(tmp_path):
    p = card_with(tmp_path, 'kind = "logmel"', 'kind = "mfcc"\ndct_norm = "ortho"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.mfcc is missing: kind = "mfcc" needs it')


def case_card_kind(tmp_path):
    p = card_with(tmp_path, 'kind = "logmel"', 'kind = "mfccs"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.kind="mfccs" must be one of waveform, spectrogram, logmel, mfcc')


def case_card_log_offset_zero(tmp_path):
    p = card_with(tmp_path, "log_offset = 1e-06", "log_offset = 0")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "frontend.log_offset=0.0 needs a log_floor > 0")


def case_card_center_not_bool(tmp_path):
    p = card_with(tmp_path, "pcm_bits = 16", 'pcm_bits = 16\ncenter = "yes"')
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            'frontend.center="yes" must be true or false')


def case_card_fft_length_huge(tmp_path):
    # issue 15: accepted once, and the process was killed for memory
    p = card_with(tmp_path, "fft_length = 512", "fft_length = 2147483648")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "frontend.fft_length=2147483648 must be an integer from 16 to 32768")


def case_card_fft_length_not_power_of_two(tmp_path):
    # issue 15: accepted once, and the C front end overflowed its buffers
    p = card_with(tmp_path, "fft_length = 512", "fft_length = 500")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "frontend.fft_length=500 must be a power of two")


def case_card_window_huge(tmp_path):
    p = card_with(tmp_path, "window_s = 1.0", "window_s = 100000.0")
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "audio.window_s=100000.0 is 1600000000 samples at 16000 Hz; it must be from 1 to")


def case_card_scaling_npy(tmp_path):
    # issue 15: a traceback once
    np.save(tmp_path / "scale.npy", np.zeros(40))
    text = CARD[:CARD.index("[scaling]")] + '[scaling]\nmean = "scale.npy"\nstd = "scale.npy"\n'
    p = tmp_path / "bad.toml"
    p.write_text(text)
    return (["replay", _good(tmp_path), "--card", p], "bad.toml",
            "the scaling file must be a .npz holding arrays 'mean' and 'std'")


def case_card_scaling_npz_without_std(tmp_path):
    np.savez(tmp_path / "scale.npz", mean=np.zeros(40))
    text = CARD[:CARD.index("[scaling]")] + '[scaling]\nmean = "scale.npz"\nstd = "scale.npz"\n'
    p = tmp_path / "bad.toml"
    p.write_text(text)
    return (["replay", _good(tmp_path), "--card", p], "scale.npz",
            "holds 'mean', not arrays 'mean' and 'std'")  # the arrays found are named


def case_truth_not_numbers(tmp_path):
    t = tmp_path / "t.tsv"
    t.write_text("start\tend\tvoices\n")
    return ["replay", _good(tmp_path), "--truth", t], "t.tsv", "not a number"


def case_report_not_a_session(tmp_path):
    (tmp_path / "plain").mkdir()
    return ["report", tmp_path / "plain"], "plain", "no session.json"


def case_harvest_bad_reason(tmp_path):
    return (["harvest", tmp_path, "--out", tmp_path / "h", "--include", "everything"],
            "--include", "unknown reason")


def case_status_not_a_run(tmp_path):
    (tmp_path / "plain").mkdir()
    return ["status", tmp_path / "plain"], "plain", "not a run folder"


def case_field_keep_not_a_budget(tmp_path):
    return (["field", tmp_path / "run", "--model", MODELS / "demo.tflite", "--keep", "20XB"],
            "--keep", "give a size")


def case_field_keep_size_twice(tmp_path):
    return (["field", tmp_path / "run", "--model", MODELS / "demo.tflite", "--keep", "1GB,2GB"],
            "--keep", "given twice")


def case_field_reserve_an_age(tmp_path):
    return (["field", tmp_path / "run", "--model", MODELS / "demo.tflite", "--reserve", "3d"],
            "--reserve", "give a size")


def case_field_reserve_not_a_size(tmp_path):
    return (["field", tmp_path / "run", "--model", MODELS / "demo.tflite", "--reserve", "lots"],
            "--reserve", "give a size")


def case_field_session_too_short(tmp_path):
    return (["field", tmp_path / "run", "--model", MODELS / "demo.tflite", "--session-hours",
             "0.0001"], "--session-hours", "at least four")


def case_field_missing_model(tmp_path):
    return ["field", tmp_path / "run", "--model", tmp_path / "nope.tflite"], "nope.tflite", \
        "not found"


def case_field_into_a_session(tmp_path):
    s = tmp_path / "sess"
    s.mkdir()
    (s / "session.json").write_text("{}")
    return (["field", s, "--model", MODELS / "demo.tflite"], "sess",
            "is a session, not a run folder")


def case_field_folder_of_other_files(tmp_path):
    d = tmp_path / "photos"
    d.mkdir()
    (d / "a.jpg").write_bytes(b"x")
    return (["field", d, "--model", MODELS / "demo.tflite"], "photos",
            "holds other files and is not a run folder")


def case_serve_port_out_of_range(tmp_path):
    return ["replay", _good(tmp_path), "--serve", "70000"], "--serve", "from 0 to 65535"


def case_serve_not_a_port(tmp_path):
    return ["replay", _good(tmp_path), "--serve", "localhost:web"], "--serve", "is not [HOST:]PORT"


def case_emulate_not_a_vectors_folder(tmp_path):
    (tmp_path / "golden").mkdir()
    return (["emulate", tmp_path / "golden", "--target", "cortex-m4"], "golden",
            "check.c is missing")


def case_emulate_unknown_core(tmp_path):
    return (["emulate", tmp_path, "--target", "cortex-m4,arm7"], "arm7",
            "not a core scenemon knows")


CASES = [v for k, v in sorted(globals().items()) if k.startswith("case_")]
NO_MODEL = {"report", "harvest", "tune", "emulate"}
OWN_FLAGS = {"field", "status"}  # no --fast / --out: a run folder is their argument


@pytest.mark.parametrize("case", CASES, ids=[c.__name__[5:] for c in CASES])
def test_bad_input(tmp_path, case):
    args, names, problem = case(tmp_path)
    out = tmp_path / "session"
    if args[0] not in NO_MODEL | OWN_FLAGS:
        if "--model" not in args:
            args = [*args, "--model", MODELS / "demo.tflite"]
        args = [*args, "--fast", "--out", out]
    r = cli(*args)  # in-process: the exit code and the stderr line are the subject here
    assert r.returncode == 2, (r.returncode, r.stderr)
    err = [line for line in r.stderr.splitlines() if line.strip() and not line.startswith("usage:")
           and "warning" not in line]
    assert len(err) == 1, r.stderr
    assert names in err[0] and problem in err[0], err[0]
    assert "Traceback" not in r.stderr
    assert not (out / "summary.json").exists()
    assert not out.exists()  # validation happens before anything is written
    assert not (tmp_path / "run").exists()  # nor a run folder


def test_debug_shows_traceback(tmp_path):
    r = run_cli("--debug", "replay", tmp_path / "x.wav", "--model", MODELS / "demo.tflite")
    assert r.returncode != 0 and "Traceback" in r.stderr


def test_out_dir_holding_a_session_is_refused(tmp_path):
    wav = _good(tmp_path)
    out = tmp_path / "s"
    assert run_cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--out", out).returncode == 0
    before = (out / "windows.jsonl").read_bytes()
    r = run_cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--out", out)
    assert r.returncode == 2 and "already holds a session" in r.stderr
    assert (out / "windows.jsonl").read_bytes() == before  # nothing captured is damaged


def test_card_with_a_byte_order_mark_is_read(tmp_path):
    # issue 15: a card saved with a UTF-8 byte-order mark (some editors on Windows) is read
    p = tmp_path / "bom.toml"
    p.write_bytes(b"\xef\xbb\xbf" + CARD.encode())
    r = cli("replay", _good(tmp_path), "--model", MODELS / "demo.tflite", "--card", p, "--fast",
            "--out", tmp_path / "s")
    assert r.returncode == 0, r.stderr


def test_help_explains_every_flag():
    for args in (["--help"], ["replay", "--help"], ["demo", "--help"]):
        r = run_cli(*args)
        assert r.returncode == 0 and "example" in r.stdout
    r = run_cli("replay", "--help")
    for flag in ("--model", "--card", "--truth", "--fast", "--headless", "--out", "--no-audio",
                 "--smoothing", "--enter", "--confirm", "--min-hold", "--allow-upsample"):
        assert flag in r.stdout


@pytest.mark.parametrize("subtype,channels,rate", [
    ("PCM_U8", 1, 16000), ("PCM_24", 1, 16000), ("FLOAT", 1, 16000), ("PCM_16", 6, 48000),
    ("PCM_16", 1, 192000), ("PCM_16", 2, 44100)])
def test_legal_but_unusual_audio_is_accepted(tmp_path, subtype, channels, rate):
    # 8-bit, 24-bit and float WAVs, 6 channels, 192 kHz are valid recordings: down-mixed,
    # resampled (soxr HQ) and run, not refused (the issue lists them among bad input; we
    # read "bad" as "unusual" and check they work)
    t = np.arange(int(2.5 * rate)) / rate
    x = 0.3 * np.sin(2 * np.pi * 440 * t)
    data = np.repeat(x[:, None], channels, axis=1)
    path = tmp_path / "odd.wav"
    sf.write(str(path), data, rate, subtype=subtype)
    r = run_cli("replay", path, "--model", MODELS / "demo.tflite", "--fast", "--out",
                tmp_path / "s")
    assert r.returncode == 0, r.stderr
    assert len((tmp_path / "s" / "windows.jsonl").read_text().splitlines()) == 4
