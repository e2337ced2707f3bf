"""The front end on the target's instruction set: the golden-vector check cross-compiled for
Cortex-M cores and run in QEMU's system emulation, bit for bit against the laptop's build;
instructions counted in emulation, checked on loops of known length; the object's flash and
RAM against binutils' `size`; and `budget --target`.

Needs arm-none-eabi-gcc with newlib and qemu-system-arm (Debian: gcc-arm-none-eabi,
libnewlib-arm-none-eabi, qemu-system-arm); skipped without them, unless
SCENEMON_REQUIRE_CORTEXM=1 (CI), which makes a missing part fail.
"""

import json
import os
import re
import shutil
import subprocess

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, card_dict, cli, compiler, write_wav
from monitor.device import C_SOURCES
from monitor.device.constants import header
from monitor.device.target.cores import CORES, cores_of
from monitor.device.target.count import count_card, count_folder, parse_counts
from monitor.device.target.cross import (
    EmulationFailed,
    check_digest,
    compile_object,
    find_toolchain,
    object_sizes,
    run_check,
)
from monitor.features.card import card_from_dict, load_card

pytestmark = pytest.mark.system

THREE = ["cortex-m3", "cortex-m4", "cortex-m33"]  # soft float, FPv4-SP, Armv8-M


@pytest.fixture(scope="module")
def toolchain():
    try:
        return find_toolchain()
    except Exception as exc:  # the one sentence that says what to install
        if os.environ.get("SCENEMON_REQUIRE_CORTEXM") == "1":
            pytest.fail(f"SCENEMON_REQUIRE_CORTEXM=1 but {exc}")
        pytest.skip(str(exc))


@pytest.fixture(scope="module")
def float_vectors(tmp_path_factory, tour, toolchain):
    """Golden vectors of the demo float model on 10 s of the tour (6 windows, every class),
    and the laptop's own check of them (the folder's Makefile, the host's C compiler)."""
    d = tmp_path_factory.mktemp("cortexm")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(d / "clip.wav", x[: 10 * sr], sr)
    out = d / "v"
    r = cli("vectors", wav, "--model", MODELS / "demo.tflite", "--runtime", "litert",
            "--out", out, "--count", "6")
    assert r.returncode == 0, r.stderr
    host = subprocess.run(["make", "-C", str(out), "check", f"CC={compiler()}"],
                          capture_output=True, text=True, timeout=300)
    assert host.returncode == 0, host.stdout + host.stderr
    digest = check_digest(host.stdout)
    assert digest is not None, host.stdout
    return out, digest


def fnv1a64(data: bytes) -> int:
    # FNV-1a, 64 bits: offset basis 14695981039346656037, prime 1099511628211 (the FNV
    # specification by Fowler, Noll and Vo, draft-eastlake-fnv)
    h = 14695981039346656037
    for b in data:
        h = ((h ^ b) * 1099511628211) % (1 << 64)
    return h


def test_the_digest_is_fnv1a_of_the_features_the_c_computed(tmp_path, float_vectors):
    # the check's last line is FNV-1a 64 over the float32 bytes (least significant first) of
    # every feature it computed, in order: the same front end built on the host by the tests'
    # own harness (tests/c/harness.c) gives the features as raw float32, and the FNV-1a of
    # their bytes computed here must be the check's digest
    assert fnv1a64(b"") == 0xcbf29ce484222325  # the FNV-1a 64 test vectors (draft-eastlake-fnv)
    assert fnv1a64(b"a") == 0xaf63dc4c8601ec8c
    out, digest = float_vectors
    exe = tmp_path / "harness"
    subprocess.run([compiler(), "-std=c99", "-O2", f"-I{out}", str(out / "frontend.c"),
                    str(ROOT / "tests" / "c" / "harness.c"), "-o", str(exe), "-lm"], check=True)
    pcm = np.loadtxt(out / "pcm.csv", delimiter=",", dtype=np.int16, ndmin=2)
    feats = subprocess.run([str(exe), "i16"], input=pcm.tobytes(), capture_output=True,
                           check=True).stdout
    assert len(feats) == 4 * pcm.shape[0] * len(np.loadtxt(out / "features.csv",
                                                           delimiter=",", ndmin=2)[0])
    le = np.frombuffer(feats, np.float32).astype("<f4").tobytes()
    assert f"{fnv1a64(le):016x}" == digest


@pytest.mark.parametrize("core", list(CORES))
def test_check_runs_on_the_core_bit_exact_with_the_laptop(tmp_path, float_vectors, toolchain,
                                                         core):
    # the vectors folder's own check.c and frontend.c, unchanged, built for the core and run
    # in QEMU (semihosting reads pcm.csv and features.csv from the folder): within tolerance
    # of the laptop's features.csv (exit 0) and bit-identical to the laptop's C build (the
    # digest): IEEE 754 rounds every float operation the same on both, the front end uses
    # no C library function but sqrtf (which IEEE 754 requires correctly rounded) and no
    # contraction to fused multiply-add
    out, host = float_vectors
    r = run_check(out, CORES[core], work=tmp_path, toolchain=toolchain)
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr
    assert "passed" in r.stdout
    assert check_digest(r.stdout) == host, (core, r.stdout.splitlines()[-2:])


@pytest.fixture(scope="module")
def q15_vectors(tmp_path_factory, tour, toolchain):
    """Golden vectors of the demo int8 MFCC model behind the q15 front end on 20 s of the
    tour (8 windows): the integer features and int8 inputs the laptop's Python model
    computed, which the shipped check compares exactly (tolerance 0)."""
    d = tmp_path_factory.mktemp("cortexm-q15")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(d / "clip.wav", x[: 20 * sr], sr)
    card = (MODELS / "demo-mfcc.int8.toml").read_text().replace(
        "[frontend]\n", '[frontend]\narithmetic = "q15"\n')
    (d / "q15.toml").write_text(card)
    out = d / "v"
    r = cli("vectors", wav, "--model", MODELS / "demo-mfcc.int8.tflite", "--card",
            d / "q15.toml", "--out", out, "--count", "8")
    assert r.returncode == 0, r.stderr
    return out


@pytest.mark.parametrize("core", list(CORES))
def test_q15_check_is_exact_on_the_core(tmp_path, q15_vectors, toolchain, core):
    # the fixed-point front end (frontend_q15.c, integers only) on the core: every q16
    # feature, every float and every int8 model input equal to the laptop's Python model's
    # (features_q16.csv, features.csv, input_int8.csv), the check's tolerances being 0
    r = run_check(q15_vectors, CORES[core], work=tmp_path, toolchain=toolchain)
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr
    last = next(x for x in r.stdout.splitlines() if x.endswith(("passed", "FAILED")))
    assert "features max abs diff 0 (tolerance 0)" in last
    assert "int8 input values that differ: 0, by at most 0 steps (tolerance 0)" in last
    assert "q16 values that differ: 0 (exact check)" in last and last.endswith("passed")


def test_q15_front_end_is_counted_and_sized_from_its_own_source(tmp_path, toolchain):
    # budget --target of a q15 card measures frontend_q15.c (its symbols, not frontend.c's)
    from monitor.device import Q15_SOURCE
    from monitor.features.card import with_arithmetic

    card = with_arithmetic(load_card(MODELS / "demo.toml"), "q15")
    (tmp_path / "frontend_constants.h").write_text(header(card))
    obj = compile_object(core=CORES["cortex-m3"], source=Q15_SOURCE, include=[tmp_path],
                         out=tmp_path / "fe.o", toolchain=toolchain)
    nm = subprocess.run([shutil.which("arm-none-eabi-nm") or "arm-none-eabi-nm", str(obj)],
                        capture_output=True, text=True, check=True).stdout
    assert "sm_features_q16" in nm and "sm_rfft" not in nm
    c = count_card(card, CORES["cortex-m3"], work=tmp_path / "count", toolchain=toolchain)
    assert c.hop is not None and 0 < c.hop < c.window


@pytest.fixture(scope="module")
def kind_folders(tmp_path_factory, tour):
    """For every kind and option of the C front end (test_device.C_CASES): a folder with the
    check's sources, that card's header and six windows of the tour; features.csv holds
    zeros and the tolerance is unbounded, because the subject here is bit-identity between
    builds (the tolerance against Python is test_device's), and the laptop's digest."""
    import io

    from test_device import C_CASES, c_case

    x, _ = sf.read(str(tour[0]), dtype="int16")
    root = tmp_path_factory.mktemp("kinds")
    out = {}
    for i, name in enumerate(C_CASES):
        card = c_case(name)
        d = root / f"case{i}"
        d.mkdir()
        (d / "frontend_constants.h").write_text(header(card))
        for src in (*C_SOURCES, C_SOURCES[0].with_name("check.c")):
            (d / src.name).write_bytes(src.read_bytes())
        w = card.window_samples
        pcm = np.stack([x[s:s + w] for s in np.linspace(0, len(x) - w, 6).astype(int)])
        buf = io.BytesIO()
        np.savetxt(buf, pcm, fmt="%d", delimiter=",")
        (d / "pcm.csv").write_bytes(buf.getvalue())
        zeros = np.zeros((6, int(np.prod(card.feature_shape))))
        buf = io.BytesIO()
        np.savetxt(buf, zeros, fmt="%g", delimiter=",")
        (d / "features.csv").write_bytes(buf.getvalue())
        (d / "check_params.h").write_text("#define SM_CHECK_WINDOWS 6\n#define SM_CHECK_INT8 0\n"
                                          "#define SM_CHECK_FEATURE_TOL 1e30f\n"
                                          "#define SM_CHECK_INT8_STEPS 1\n")
        subprocess.run([compiler(), "-std=c99", "-O2", f"-I{d}", str(d / "frontend.c"),
                        str(d / "check.c"), "-o", str(d / "host"), "-lm"], check=True)
        r = subprocess.run([str(d / "host")], cwd=d, capture_output=True, text=True)
        assert r.returncode == 0, r.stdout[-500:]
        out[name] = (d, check_digest(r.stdout))
    return out


@pytest.mark.parametrize("core", ["cortex-m3", "cortex-m4"])
def test_every_kind_and_option_is_bit_exact_on_the_core(tmp_path, kind_folders, toolchain,
                                                          core):
    # every kind (log-mel, MFCC, spectrogram, waveform) and option of the front end (log10,
    # dB, top_db, centre padding, pre-emphasis, per-window standardisation, ...), in software
    # float (M3) and on an FPU with fused multiply-add (M4): the same bits as the laptop
    differ = []
    for name, (d, host) in kind_folders.items():
        r = run_check(d, CORES[core], work=tmp_path / d.name, toolchain=toolchain)
        assert r.returncode == 0, (name, r.stdout[-500:])
        if check_digest(r.stdout) != host:
            differ.append(name)
    assert differ == []


def test_contraction_to_fma_changes_the_bits_on_an_fma_core(tmp_path, float_vectors, toolchain):
    # the Cortex-M4's FPv4-SP has VFMA (Armv7-M Architecture Reference Manual, the
    # floating-point extension's instructions); built with -ffp-contract=fast gcc fuses
    # a * b + c there and the features are no longer the laptop's bits (though still within
    # tolerance): why every build here says -ffp-contract=off
    out, host = float_vectors
    m4 = CORES["cortex-m4"]
    r = run_check(out, m4, work=tmp_path, toolchain=toolchain, contract="fast")
    assert r.returncode == 0, r.stdout[-2000:]
    assert check_digest(r.stdout) != host
    elf = tmp_path / "check-cortex-m4-fast.elf"
    objdump = shutil.which("arm-none-eabi-objdump")
    if objdump:
        dis = subprocess.run([objdump, "-d", str(elf)], capture_output=True, text=True).stdout
        assert re.search(r"\bvfma\.f32\b", dis)


def test_gnu_c_modes_contract_and_iso_c_modes_do_not(tmp_path, toolchain):
    # GCC's manual, -ffp-contract: "The default is -ffp-contract=off for C in a standards
    # compliant mode (-std=c11 or similar), -ffp-contract=fast otherwise": the front end
    # compiled for the M4 as ISO C99 has no fused multiply-add, as GNU C99 it has
    objdump = shutil.which("arm-none-eabi-objdump")
    if objdump is None:
        pytest.skip("arm-none-eabi-objdump not found")
    card = load_card(MODELS / "demo.toml")
    (tmp_path / "frontend_constants.h").write_text(header(card))
    m4 = CORES["cortex-m4"]
    fused = {}
    for std in ("c99", "gnu99"):
        obj = tmp_path / f"{std}.o"
        subprocess.run([toolchain.gcc, *m4.cflags, f"-std={std}", "-O2", f"-I{tmp_path}", "-c",
                        str(C_SOURCES[0]), "-o", str(obj)], check=True)
        dis = subprocess.run([objdump, "-d", str(obj)], capture_output=True, text=True).stdout
        fused[std] = len(re.findall(r"\bvf[mn]?[ams]\.f32\b", dis))
    assert fused["c99"] == 0 and fused["gnu99"] > 0, fused


@pytest.mark.parametrize("core", THREE + ["cortex-m55"])
def test_instruction_count_holds_on_loops_of_known_length(tmp_path, toolchain, core):
    # count.c's loops: "subs; bne" n times then "bx lr" is 2 n + 1 instructions, "adds; eors;
    # subs; bne" n times then "bx lr" 4 n + 1 (one instruction each, Armv7-M / Armv8-M
    # Architecture Reference Manual); the first sets how many instructions a SysTick tick
    # is, the second must then come out within one tick. Under -icount shift=0 one
    # instruction is one nanosecond of emulated time (QEMU's documentation, -icount), so a
    # tick is 1e9 / the board's clock: 25 MHz on MPS2 boards, 40 instructions (from memory)
    card = load_card(MODELS / "demo.toml")
    c = count_card(card, CORES[core], work=tmp_path, toolchain=toolchain)
    assert c.check_expected == 4 * 1_000_000 + 1
    assert abs(c.check_counted - c.check_expected) <= c.per_tick
    if CORES[core].machine in ("mps2-an385", "mps2-an386", "mps2-an500"):
        assert c.per_tick == pytest.approx(40.0, rel=1e-5)
    assert c.window > 0 and c.hop is not None and 0 < c.hop < c.window


def test_a_count_that_does_not_hold_is_refused():
    # a fault injected into the count's output (a fake line, not a run): the check loop's
    # ticks made 1% short; the count is refused rather than reported
    good = "calibration 8000001 200000\ncheck 4000001 100000\ninit 10\nwindow 0 500\n"
    assert parse_counts("cortex-m4", good).check_counted == pytest.approx(4000000.5, abs=1)
    with pytest.raises(EmulationFailed, match="is off"):
        parse_counts("cortex-m4", good.replace("check 4000001 100000", "check 4000001 99000"))


def test_steady_hop_counts_are_the_streams_share_of_a_window(tmp_path, float_vectors, toolchain):
    # the stream computes only the frames a hop adds (frontend.h): the demo card's hop of
    # 8000 samples adds 50 of a window's 98 frames (frame step 160, length 400), so a steady
    # hop does a bit more than half a window's frames (the whole-window scaling and the
    # history shift come on top) and clearly less than a whole window
    out, _ = float_vectors
    c = count_folder(out, CORES["cortex-m4"], work=tmp_path, toolchain=toolchain)
    frames_new, frames = 50, 98
    assert len(c.steady_hops) >= 4
    spread = max(c.steady_hops) / min(c.steady_hops)
    assert spread < 1.01  # every steady hop does the same work (counts within 1%)
    assert frames_new / frames * 0.9 < c.hop / c.window < 0.75


def test_counts_grow_with_the_fft_size(tmp_path, toolchain):
    # a radix-2 FFT of N points does N/2 log2 N butterflies (Cooley and Tukey 1965): 1024
    # points do 2.22 times the work of 512; the other stages grow by at most that (bins
    # double, the window and the mel bands stay), so the front end's count per hop grows by
    # more than 1 and at most 2.23 times
    small = card_from_dict(card_dict(frontend={"fft_length": 512}))
    large = card_from_dict(card_dict(frontend={"fft_length": 1024}))
    m4 = CORES["cortex-m4"]
    a = count_card(small, m4, work=tmp_path / "a", toolchain=toolchain)
    b = count_card(large, m4, work=tmp_path / "b", toolchain=toolchain)
    ratio = b.hop / a.hop
    assert 1.0 < ratio <= (1024 * 10) / (512 * 9) + 0.01, ratio


@pytest.mark.parametrize("core", THREE)
def test_object_sizes_are_what_binutils_size_says(tmp_path, toolchain, core):
    # flash and RAM of frontend.o, read from its section table here, against GNU binutils'
    # arm-none-eabi-size (Berkeley format: text, data, bss)
    card = load_card(MODELS / "demo.toml")
    (tmp_path / "frontend_constants.h").write_text(header(card))
    obj = compile_object(core=CORES[core], source=C_SOURCES[0], include=[tmp_path],
                         out=tmp_path / "frontend.o", toolchain=toolchain)
    s = object_sizes(obj)
    row = subprocess.run([toolchain.size, "-B", str(obj)], capture_output=True, text=True,
                         check=True).stdout.splitlines()[1].split()
    assert (s.text, s.data, s.bss) == tuple(int(v) for v in row[:3])
    assert s.flash == s.text + s.data and s.ram == s.data + s.bss


def test_budget_target_labels_every_figure(toolchain):
    pytest.importorskip("tflite_micro", reason="tflite-micro not installed")
    model = MODELS / "demo.int8.tflite"
    r = cli("budget", "--model", model, "--clock-mhz", "80", "--target", ",".join(THREE))
    assert r.returncode == 0, r.stderr
    text = r.stdout
    assert all(len(line) <= 80 for line in text.splitlines())  # an 80-column terminal
    flat = " ".join(text.split())  # a phrase may wrap at 80 columns
    for label in ("measured", "counted", "from memory", "assumed", "instructions, not cycles",
                  "recorded", "with the library routines it calls"):
        assert label in flat, label
    assert "about" in text and "of the core" in text  # the single-figure estimate stays
    assert "the single-figure estimate above" in text
    rows = [line for line in text.splitlines() if line.split()[:1] in ([c] for c in THREE)]
    assert {line.split()[0] for line in rows} == set(THREE)

    b = json.loads(cli("budget", "--model", model, "--clock-mhz", "80", "--target",
                       ",".join(THREE), "--json").stdout)
    assert [t["core"] for t in b["targets"]] == THREE
    for t in b["targets"]:
        assert 0 < t["hop_instructions"] < t["window_instructions"]
        assert t["frontend_ram_bytes"] >= 4 * 16000  # the window's float samples (sm_hist)
        assert t["flash_bytes"] == b["model_bytes"] + t["frontend_linked_flash_bytes"]
        e = t["estimate"]
        assert e["duty_cycle"] == pytest.approx(
            (e["frontend_cycles"] + e["model_cycles"]) / (80e6 * 0.5))
        assert e["model_cycles"] == b["macs"] * t["int8_cycles_per_mac"]
        assert set(t["how"]) >= {"frontend_flash_bytes", "hop_instructions", "cycles_per_mac"}
    # soft float: the M3 executes more instructions than the M4 with its FPU
    m3, m4 = b["targets"][0], b["targets"][1]
    assert m3["hop_instructions"] > 2 * m4["hop_instructions"]


def test_budget_target_frontend_flash_is_the_objects(tmp_path, toolchain):
    # budget's flash figure for the front end is arm-none-eabi-size's text + data of the same
    # object built the same way
    pytest.importorskip("tflite_micro", reason="tflite-micro not installed")
    b = json.loads(cli("budget", "--model", MODELS / "demo.int8.tflite", "--target",
                       "cortex-m4", "--json").stdout)
    card = load_card(MODELS / "demo.int8.toml")
    (tmp_path / "frontend_constants.h").write_text(header(card))
    obj = compile_object(core=CORES["cortex-m4"], source=C_SOURCES[0], include=[tmp_path],
                         out=tmp_path / "frontend.o", toolchain=toolchain)
    text, data, bss = (int(v) for v in subprocess.run(
        [toolchain.size, "-B", str(obj)], capture_output=True, text=True,
        check=True).stdout.splitlines()[1].split()[:3])
    t = b["targets"][0]
    assert t["frontend_flash_bytes"] == text + data and t["frontend_ram_bytes"] == data + bss


def test_unknown_core_is_one_sentence():
    r = cli("budget", "--model", MODELS / "demo.int8.tflite", "--target", "cortex-m9")
    assert r.returncode == 2
    err = [x for x in r.stderr.splitlines() if x.strip()]
    assert len(err) == 1 and "cortex-m9" in err[0] and "cortex-m4" in err[0], r.stderr
    assert [c.name for c in cores_of("m4, cortex-m33,m4")] == ["cortex-m4", "cortex-m33"]


def test_missing_toolchain_says_which_package(monkeypatch):
    # the tools taken off PATH (the machine's, not a fake of them): one sentence naming the
    # Debian packages to install, exit 2, before the model loads
    monkeypatch.setenv("PATH", "/nonexistent")
    r = cli("budget", "--model", MODELS / "demo.int8.tflite", "--target", "cortex-m4")
    assert r.returncode == 2
    err = [x for x in r.stderr.splitlines() if x.strip()]
    assert len(err) == 1 and "gcc-arm-none-eabi" in err[0] and "Traceback" not in r.stderr


def test_emulate_runs_the_folders_check_on_the_cores(tmp_path, float_vectors, toolchain):
    # `scenemon emulate`: the laptop's run and each core's, every digest the laptop's
    out, host = float_vectors
    r = cli("emulate", out, "--target", ",".join(THREE), "--json")
    assert r.returncode == 0, r.stdout + r.stderr
    d = json.loads(r.stdout)
    assert [x["where"] for x in d["runs"]] == ["laptop", *THREE]
    assert all(x["passed"] and x["digest"] == host and x["same_bits"] for x in d["runs"])
    text = cli("emulate", out, "--target", "cortex-m4").stdout
    assert all(len(line) <= 80 for line in text.splitlines())
    assert "same bits" in text and host in text


def test_emulate_fails_a_check_out_of_tolerance(tmp_path, float_vectors, toolchain):
    # a fault injected: one value of features.csv moved by 1.0, far beyond the tolerance;
    # the check fails on the core and on the laptop, and emulate exits 1
    out, _ = float_vectors
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)
    rows = (bad / "features.csv").read_text().splitlines()
    first = rows[0].split(",")
    first[3] = repr(float(first[3]) + 1.0)
    (bad / "features.csv").write_text("\n".join([",".join(first), *rows[1:]]) + "\n")
    r = cli("emulate", bad, "--target", "cortex-m4")
    assert r.returncode == 1
    assert "FAILED" in r.stdout


def test_emulate_refuses_a_folder_without_a_check(tmp_path, toolchain):
    (tmp_path / "pcm.csv").write_text("0\n")
    r = cli("emulate", tmp_path, "--target", "cortex-m4")
    assert r.returncode == 2
    err = [x for x in r.stderr.splitlines() if x.strip()]
    assert len(err) == 1 and str(tmp_path) in err[0] and "check.c is missing" in err[0]


def test_linked_flash_counts_the_library_routines_the_front_end_calls(tmp_path, toolchain):
    # the M3 has no FPU: the float front end pulls in libgcc's soft-float routines
    # (__aeabi_fmul and the rest: the Arm run-time ABI, RTABI32), which the linked figure
    # holds and the object's own sections do not; on the M4 they are FPU instructions
    from monitor.device.target.cross import PROBE_SOURCE, build, linked_flash

    card = load_card(MODELS / "demo.toml")
    (tmp_path / "frontend_constants.h").write_text(header(card))
    inc = [tmp_path, C_SOURCES[0].parent]
    m3 = linked_flash(core=CORES["cortex-m3"], source=C_SOURCES[0], include=inc,
                      work=tmp_path / "m3", toolchain=toolchain)
    m4 = linked_flash(core=CORES["cortex-m4"], source=C_SOURCES[0], include=inc,
                      work=tmp_path / "m4", toolchain=toolchain)
    elf = build(core=CORES["cortex-m3"], sources=[C_SOURCES[0], PROBE_SOURCE], include=inc,
                out=tmp_path / "p.elf", toolchain=toolchain, defines=("SM_LINK_PROBE=1",))
    nm = subprocess.run([shutil.which("arm-none-eabi-nm") or "arm-none-eabi-nm", str(elf)],
                        capture_output=True, text=True, check=True).stdout
    assert "__aeabi_fmul" in nm and "sm_push_hop" in nm
    assert m3 > m4 > 0
