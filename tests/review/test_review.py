"""Report, tune and harvest against outside references (sed_eval, scikit-learn, Chromium)."""

import csv
import json
import shutil
import subprocess

import numpy as np
import pytest

from conftest import MODELS, cli, jumpy_copy
from monitor.decisions.decide import decide_sequence
from monitor.features.card import DecisionSettings, load_card
from monitor.review.metrics import window_metrics
from monitor.session.reader import load_session

sklearn_metrics = pytest.importorskip("sklearn.metrics")


def windows_from(truth, est, hop=1.0):
    return [{"i": i, "t0": i * hop, "t1": i * hop + 1.0, "truth": t, "decision": e,
             "probs": [0.5, 0.5], "smoothed": [0.5, 0.5]} for i, (t, e) in enumerate(zip(truth, est))]


def sed_eval_scores(truth, est, labels):
    dcase_util = pytest.importorskip("dcase_util")
    sed_eval = pytest.importorskip("sed_eval")
    ref = dcase_util.containers.MetaDataContainer(
        [{"filename": f"w{i}", "scene_label": t} for i, t in enumerate(truth)])
    sys_ = dcase_util.containers.MetaDataContainer(
        [{"filename": f"w{i}", "scene_label": e} for i, e in enumerate(est)])
    m = sed_eval.scene.SceneClassificationMetrics(scene_labels=labels)
    m.evaluate(reference_scene_list=ref, estimated_scene_list=sys_)
    return m.results()


def test_worked_example_against_sed_eval_and_sklearn():
    # truth AAAAAAAABB vs estimate AAAAAAABAB, counted by hand: overall 8/10, class A 7/8,
    # class B 1/2, class-wise mean 0.6875; checked against sed_eval's
    # SceneClassificationMetrics (Mesaros et al. 2016) and sklearn's balanced_accuracy_score
    truth, est = list("AAAAAAAABB"), list("AAAAAAABAB")
    sc = window_metrics(windows_from(truth, est), ["A", "B"])
    res = sed_eval_scores(truth, est, ["A", "B"])
    assert sc.accuracy == pytest.approx(res["overall"]["accuracy"]) == pytest.approx(0.8)
    assert sc.per_class["A"]["recall"] == pytest.approx(res["class_wise"]["A"]["accuracy"]["accuracy"])
    assert sc.per_class["A"]["recall"] == pytest.approx(0.875)
    assert sc.per_class["B"]["recall"] == pytest.approx(0.5)
    assert sc.balanced_accuracy == pytest.approx(res["class_wise_average"]["accuracy"]["accuracy"])
    assert sc.balanced_accuracy == pytest.approx(sklearn_metrics.balanced_accuracy_score(truth, est))
    # confusion: truth AAAAABBBBB vs AAABABBBAB -> [[4, 1], [1, 4]] (sklearn's convention)
    sc2 = window_metrics(windows_from(list("AAAAABBBBB"), list("AAABABBBAB")), ["A", "B"])
    assert [row[:2] for row in sc2.confusion] == [[4, 1], [1, 4]]
    # switch rate: 1 true change vs 5 estimated changes
    assert sc2.changes == 5 and sc2.truth_changes == 1


@pytest.fixture(scope="module")
def argmax_session(tour, tmp_path_factory):
    """The int8 model's plain argmax on the tour: real errors, never undecided."""
    out = tmp_path_factory.mktemp("rev") / "s"
    r = cli("replay", tour[0], "--model", MODELS / "demo.int8.tflite", "--truth", tour[1],
                "--fast", "--out", out, "--smoothing", "none", "--confirm", "1", "--enter", "0",
                "--margin", "0")
    assert r.returncode == 0, r.stderr
    return out


def test_session_scores_against_sed_eval_and_sklearn(argmax_session):
    s = load_session(argmax_session)
    sc = window_metrics(s.windows, s.classes, truth_spans=s.truth.spans)
    w = [x for x in s.windows if x["truth"] is not None]
    truth, est = [x["truth"] for x in w], [x["decision"] for x in w]
    assert None not in est and sc.accuracy < 1.0  # there are errors to score
    res = sed_eval_scores(truth, est, s.classes)
    assert sc.accuracy == pytest.approx(res["overall"]["accuracy"])
    assert sc.balanced_accuracy == pytest.approx(res["class_wise_average"]["accuracy"]["accuracy"])
    assert sc.balanced_accuracy == pytest.approx(sklearn_metrics.balanced_accuracy_score(truth, est))
    cm = sklearn_metrics.confusion_matrix(truth, est, labels=s.classes)
    assert [row[:-1] for row in sc.confusion] == cm.tolist()
    p, r, f, _ = sklearn_metrics.precision_recall_fscore_support(truth, est, labels=s.classes,
                                                                  zero_division=0)
    for i, c in enumerate(s.classes):
        assert sc.per_class[c]["precision"] == pytest.approx(p[i])
        assert sc.per_class[c]["recall"] == pytest.approx(r[i])
        assert sc.per_class[c]["f1"] == pytest.approx(f[i])


def test_latency_definition(argmax_session):
    # our definition (metrics.py): change onset -> t1 of the first window deciding the new truth
    s = load_session(argmax_session)
    sc = window_metrics(s.windows, s.classes, truth_spans=s.truth.spans)
    spans = s.truth.spans
    expect = []
    for sp in spans[1:]:
        hit = next(w for w in s.windows if w["t1"] > sp.onset and w["decision"] == sp.label)
        expect.append(hit["t1"] - sp.onset)
    assert sc.latencies == pytest.approx(expect)
    assert sc.truth_changes == len(spans) - 1


def test_report_terminal_and_json(argmax_session, tour_windows):
    r = cli("report", argmax_session)
    assert r.returncode == 0 and "accuracy" in r.stdout and "confusion" in r.stdout
    r = cli("report", argmax_session, "--json")
    d = json.loads(r.stdout)
    assert d["windows"] == tour_windows and 0.9 < d["accuracy"] < 1.0


def chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        if shutil.which(name):
            return shutil.which(name)
    return None


@pytest.mark.system
def test_html_report_in_headless_chromium(argmax_session, tmp_path):
    html_path = tmp_path / "r.html"
    r = cli("report", argmax_session, "--html", html_path)
    assert r.returncode == 0, r.stderr
    text = html_path.read_text()
    assert "<svg" in text and "data:audio/wav;base64," in text
    import re

    # self-contained: nothing is fetched (XML namespace names are not fetches)
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", text)
    assert not re.search(r"url\(\s*['\"]?https?:", text) and "@import" not in text
    exe = chromium()
    if exe is None:
        if __import__("os").environ.get("SCENEMON_REQUIRE_BROWSER") == "1":
            pytest.fail("SCENEMON_REQUIRE_BROWSER=1 but no chromium")
        pytest.skip("no chromium installed")
    shot = tmp_path / "shot.png"
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr", "--v=0",
             "--hide-scrollbars", "--window-size=1200,1600"]
    p = subprocess.run([exe, *flags, f"--screenshot={shot}", html_path.as_uri()],
                       capture_output=True, text=True, timeout=120)
    assert shot.is_file() and shot.stat().st_size > 20000, p.stderr[-2000:]
    console = [line for line in p.stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]
    assert console == []
    # the screenshot shows the plots: many distinct colours, not a blank page
    from matplotlib.image import imread

    img = imread(str(shot))[..., :3]
    colours = np.unique((img.reshape(-1, 3) * 255).astype(np.uint8), axis=0)
    assert len(colours) > 200
    dom = subprocess.run([exe, *flags, "--dump-dom", html_path.as_uri()], capture_output=True,
                         text=True, timeout=120).stdout
    assert "id=\"timeline\"" in dom and "id=\"confusion\"" in dom and "<audio" in dom
    assert "id=\"level\"" in dom  # the level figure, with its legend
    # every figure has its legend, and the snippet table its review state
    assert dom.count("class=\"legend\"") >= 4
    assert "class=\"state-new\"" in dom or "class=\"state-kept\"" in dom


def test_html_escapes_hostile_strings(argmax_session, tmp_path):
    # a hostile label in a sidecar must not become markup
    d = tmp_path / "copy"
    shutil.copytree(argmax_session, d)
    side = next((d / "snippets").glob("*/*.json"))
    m = json.loads(side.read_text())
    m["label"] = "<script>alert(1)</script>"
    side.write_text(json.dumps(m))
    r = cli("report", d, "--html", tmp_path / "h.html")
    assert r.returncode == 0, r.stderr
    text = (tmp_path / "h.html").read_text()
    assert "<script" not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_incomplete_session_still_reports_and_counts_bad_lines(argmax_session, tmp_path):
    d = tmp_path / "broken"
    shutil.copytree(argmax_session, d)
    (d / "summary.json").unlink()
    with open(d / "windows.jsonl", "a") as f:
        f.write('{"i": 999, "t0": 1')  # a torn last line
    lines = (d / "windows.jsonl").read_text().splitlines()
    lines.insert(10, "not json at all")
    (d / "windows.jsonl").write_text("\n".join(lines))
    r = cli("report", d)
    assert r.returncode == 0, r.stderr
    assert "incomplete" in r.stdout and "2 unreadable line(s)" in r.stdout


def test_tune_row_rederived_by_hand(argmax_session):
    # one table row, computed here with plain loops from windows.jsonl
    from monitor.review.tune import evaluate

    s = load_session(argmax_session)
    cfg = DecisionSettings(smoothing="mean", smoothing_windows=3, enter=0.6, margin=0.1,
                           confirm=2, min_hold_s=0.0)
    row = evaluate([s], cfg)
    probs = np.array([w["probs"] for w in s.windows])
    t1 = np.array([w["t1"] for w in s.windows])
    _, dec = decide_sequence(probs, t1, cfg)
    labels = [None if d is None else s.classes[d] for d in dec]
    hits = sum(1 for w, d in zip(s.windows, labels) if w["truth"] and d == w["truth"])
    total = sum(1 for w in s.windows if w["truth"])
    assert row.accuracy == pytest.approx(hits / total)
    made = next((k for k, x in enumerate(labels) if x is not None), len(labels))
    rest = labels[made:]  # the undecided start is not a change: the first decision is made
    changes = sum(1 for a, b in zip(rest, rest[1:]) if a != b)
    assert row.switches_per_min == pytest.approx(changes / (t1[-1] / 60))
    lat = []
    for sp in s.truth.spans[1:]:
        for w, d in zip(s.windows, labels):
            if w["t1"] > sp.onset and d == sp.label:
                lat.append(w["t1"] - sp.onset)
                break
    assert row.latency_median == pytest.approx(float(np.median(lat)))


def test_tune_cli_and_apply_keeps_the_rest_of_the_card(argmax_session, tmp_path):
    card = tmp_path / "m.toml"
    shutil.copy(MODELS / "demo.toml", card)
    before = card.read_text().splitlines()
    r = cli("tune", argmax_session, "--grid", "smoothing=mean,ema;enter=0.5,0.7;margin=0;"
                "confirm=1,2;min_hold_s=0", "--apply", card)
    assert r.returncode == 0, r.stderr
    assert "recommended:" in r.stdout and "trade-off front" in r.stdout
    after = card.read_text().splitlines()
    i = before.index("[decision]")
    assert after[:i + 1] == before[:i + 1]  # everything above the table untouched
    c = load_card(card)
    assert c.decision.smoothing in ("mean", "ema") and c.decision.confirm in (1, 2)
    assert c.mean.tolist() == load_card(MODELS / "demo.toml").mean.tolist()


def test_tune_refuses_sessions_without_truth(tmp_path):
    from conftest import write_wav

    wav = write_wav(tmp_path / "n.wav", np.random.default_rng(0).standard_normal(48000) * 0.05)
    assert cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--out",
                   tmp_path / "s").returncode == 0
    r = cli("tune", tmp_path / "s")
    assert r.returncode == 2 and "no window has a truth label" in r.stderr


def test_harvest(argmax_session, tmp_path):
    a = tmp_path / "a"
    shutil.copytree(argmax_session, a)
    sides = sorted((a / "snippets").glob("*/*.json"))
    assert len(sides) >= 3
    # a relabel and a drop, as the relabel view writes them
    m0 = json.loads(sides[0].read_text())
    m0["label"], m0["relabeled_from"] = "other", m0["label"]
    sides[0].write_text(json.dumps(m0))
    m1 = json.loads(sides[1].read_text())
    m1["dropped"] = True
    sides[1].write_text(json.dumps(m1))
    b = tmp_path / "b"
    shutil.copytree(a, b)  # the same snippets again: duplicates by audio sha256
    out = tmp_path / "set"
    r = cli("harvest", a, b, "--out", out)
    assert r.returncode == 0, r.stderr
    rows = list(csv.DictReader(open(out / "manifest.csv")))
    assert len(rows) == len(sides) - 1  # one dropped, duplicates once
    assert len({r_["audio_sha256"] for r_ in rows}) == len(rows)
    assert any(r_["label"] == "other" and r_["path"].startswith("other/") for r_ in rows)
    assert set(rows[0]) == {"path", "label", "reason", "session", "t0", "duration", "predicted",
                            "predicted_b", "confidence", "model_sha256", "audio_sha256", "decision"}
    for r_ in rows:
        assert (out / r_["path"]).is_file()
    stamp = {p: p.stat().st_mtime_ns for p in out.rglob("*.wav")}
    r = cli("harvest", a, "--out", out)  # re-run: nothing new, nothing rewritten
    assert r.returncode == 0 and "0 new snippet" in r.stdout
    assert {p: p.stat().st_mtime_ns for p in out.rglob("*.wav")} == stamp
    other = tmp_path / "busy"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    r = cli("harvest", a, "--out", other)
    assert r.returncode == 2 and "not an earlier harvest" in r.stderr
    assert (other / "notes.txt").read_text() == "mine"


# --- the report's words and columns, model B's side -------------------------------------------
@pytest.fixture(scope="module")
def ab_session(tour, tmp_path_factory):
    """Model A: the demo model; model B: its int8 version deciding on every raw window (no
    smoothing, no confirmation) with a copy of the int8 profile, so that the two disagree at
    times (models_disagree snippets) and each has an unfamiliar share of its own."""
    d = tmp_path_factory.mktemp("abrev")
    b = jumpy_copy(d, "demo.int8", profile=True)
    out = d / "s"
    r = cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--model", b, "--truth",
            tour[1], "--fast", "--headless", "--out", out)
    assert r.returncode == 0, r.stderr
    return out


def table_of(page, heading):
    """The cells' text of the first HTML table after `heading` (tags left out), row by row."""
    from html.parser import HTMLParser

    class Cells(HTMLParser):
        def __init__(self):
            super().__init__()
            self.rows, self.cell = [], None

        def handle_starttag(self, tag, attrs):
            if tag == "tr":
                self.rows.append([])
            elif tag in ("td", "th"):
                self.cell = ""

        def handle_endtag(self, tag):
            if tag in ("td", "th") and self.cell is not None:
                self.rows[-1].append(self.cell.strip())
                self.cell = None

        def handle_data(self, data):
            if self.cell is not None:
                self.cell += data

    start = page.index(heading)
    table = page[page.index("<table", start):page.index("</table>", start) + 8]
    p = Cells()
    p.feed(table)
    return p.rows


def end_columns(line, tokens):
    """Where each of `tokens` ends in `line`, searched left to right."""
    ends, at = [], 0
    for tok in tokens:
        at = line.index(tok, at) + len(tok)
        ends.append(at)
    return ends


@pytest.mark.parametrize("which", ["one", "ab"])
def test_per_class_headings_end_over_their_values(which, argmax_session, ab_session):
    s = argmax_session if which == "one" else ab_session
    r = cli("report", s)
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    i = next(k for k, line in enumerate(lines) if line.lstrip().startswith("class "))
    heads = (["precision", "recall", "F1"] if which == "one" else
             [f"{m} {h}" for m in "AB" for h in ("prec", "rec", "F1")]) + ["windows"]
    want = end_columns(lines[i], heads)
    classes = load_session(s).classes
    for line in lines[i + 1:i + 1 + len(classes)]:
        assert line.split()[0] in classes
        values = line.split()[1:]
        assert len(values) == len(heads), line
        assert end_columns(line, [line.split()[0], *values])[1:] == want, (lines[i], line)


def test_latency_line_says_every_change_was_reached(argmax_session):
    import dataclasses

    from monitor.review.report import model_metrics, text_report

    s = load_session(argmax_session)
    ms = model_metrics(s)
    assert ms[0].never_reached == 0 and ms[0].truth_changes > 0
    text = text_report(s, ms)
    assert "reached after every truth change" in text and "never reached 0" not in text
    one_missed = dataclasses.replace(ms[0], never_reached=1)
    text = text_report(s, [one_missed])
    assert f"not reached after 1 of {ms[0].truth_changes} truth changes" in text
    assert "every truth change" not in text
    none = dataclasses.replace(ms[0], never_reached=ms[0].truth_changes, latencies=[])
    text = text_report(s, [none])
    assert f"never reached the new truth ({ms[0].truth_changes} changes)" in text
    assert "median -" not in text and "every truth change" not in text


def test_level_axis_holds_the_silence_line(argmax_session):
    # the legend speaks of the dotted line at the silence threshold: it must be drawn
    from monitor.decisions.tally import SILENT_BELOW_DBFS
    from monitor.review.report import level_figure, model_metrics

    s = load_session(argmax_session)
    levels = np.array([w["level_dbfs"] for w in s.windows], dtype=float)
    assert levels.min() > SILENT_BELOW_DBFS + 5  # the tour is never silent: a real test
    fig = level_figure(s, model_metrics(s)[0])
    ax = fig.axes[0]
    lo, hi = ax.get_ylim()
    assert lo < SILENT_BELOW_DBFS < hi and lo <= levels.min() and levels.max() <= hi
    assert any(np.allclose(line.get_ydata(), SILENT_BELOW_DBFS) for line in ax.get_lines())


def test_report_gives_each_models_unfamiliar_share(ab_session, tmp_path):
    # each model's share re-derived from its own window file
    shares = []
    for name in ("windows.jsonl", "windows.b.jsonl"):
        ws = [json.loads(x) for x in (ab_session / name).read_text().splitlines()]
        shares.append((sum(1 for w in ws if w["unfamiliar"]), len(ws)))
    assert shares[0] != shares[1]  # else A's figure could pass for B's
    r = cli("report", ab_session, "--html", tmp_path / "r.html")
    assert r.returncode == 0, r.stderr
    page = (tmp_path / "r.html").read_text()
    for who, (n, total) in zip("AB", shares):
        assert f"unfamiliar {who}: {n / total:.1%} of windows ({n})" in r.stdout
        assert f"<b>{n / total:.1%}</b>unfamiliar windows ({who})" in page


def test_models_disagree_snippets_show_both_predictions(ab_session, tmp_path):
    from monitor.session.snippets import iter_snippets

    snips = iter_snippets(ab_session)
    md = {f"{sn.t0:.1f} s": sn.meta for sn in snips if sn.reason == "models_disagree"}
    assert md and len(md) < len(snips)
    assert any(m["model_b"]["predicted"] != m["predicted"] for m in md.values())
    r = cli("report", ab_session, "--html", tmp_path / "r.html")
    assert r.returncode == 0, r.stderr
    rows = table_of((tmp_path / "r.html").read_text(), "<h2>Snippets")
    head = rows[0]
    col = {name: head.index(name) for name in ("predicted A", "predicted B", "reason", "from")}
    assert len(rows) - 1 == len(snips)
    for row in rows[1:]:
        if row[col["reason"]] == "models_disagree":
            meta = md[row[col["from"]]]
            assert row[col["predicted A"]] == meta["predicted"]
            assert row[col["predicted B"]] == meta["model_b"]["predicted"]
        else:
            assert row[col["predicted B"]] == ""


def test_manifest_has_model_bs_prediction(ab_session, tmp_path):
    from monitor.session.snippets import iter_snippets

    d = tmp_path / "s"
    shutil.copytree(ab_session, d)
    md = [sn for sn in iter_snippets(d) if sn.reason == "models_disagree"]
    # a hostile prediction in one sidecar: neutralised like every manifest cell (OWASP CSV
    # injection guidance: a leading quote makes it text)
    m = json.loads(md[0].sidecar.read_text())
    m["model_b"]["predicted"] = "=HYPERLINK(\"http://x\")"
    md[0].sidecar.write_text(json.dumps(m))
    r = cli("harvest", d, "--out", tmp_path / "set")
    assert r.returncode == 0, r.stderr
    with open(tmp_path / "set" / "manifest.csv", newline="") as f:
        rows = {row["audio_sha256"]: row for row in csv.DictReader(f)}
    b_of = {sn.meta["audio_sha256"]: (json.loads(sn.sidecar.read_text())["model_b"]["predicted"])
            for sn in md}
    seen = 0
    for sn in iter_snippets(d):
        row = rows.get(sn.meta["audio_sha256"])
        if row is None:
            continue
        if sn.reason == "models_disagree":
            b = b_of[sn.meta["audio_sha256"]]
            assert row["predicted_b"] == ("'" + b if b.startswith("=") else b)
            seen += 1
        else:
            assert row["predicted_b"] == ""
    assert seen == len(md)
    assert "'=HYPERLINK(\"http://x\")" in {row["predicted_b"] for row in rows.values()}


def test_harvest_takes_over_a_manifest_without_predicted_b(argmax_session, tmp_path):
    # a set harvested before the column existed is still ours: its rows get it empty
    out = tmp_path / "set"
    assert cli("harvest", argmax_session, "--out", out).returncode == 0
    with open(out / "manifest.csv", newline="") as f:
        old = [{k: v for k, v in row.items() if k != "predicted_b"} for row in csv.DictReader(f)]
    with open(out / "manifest.csv", "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(old[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(old)
    r = cli("harvest", argmax_session, "--out", out)
    assert r.returncode == 0, r.stderr
    with open(out / "manifest.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == len(old) and all(row["predicted_b"] == "" for row in rows)


def test_unfamiliar_and_a_b_differences_have_marks_of_their_own(ab_session):
    # red triangles: A's unfamiliar windows; light grey spans: where A and B decide
    # differently; neither a class colour (a class colour means that class)
    from matplotlib.colors import to_hex

    from monitor.base import palette as P
    from monitor.review.report import model_metrics, timeline_figure

    s = load_session(ab_session)
    fig = timeline_figure(s, model_metrics(s)[0])
    top = fig.axes[0]
    unf = [line for line in top.get_lines() if line.get_label() == "unfamiliar sound"]
    assert len(unf) == 1 and unf[0].get_marker() == "v"
    assert list(unf[0].get_xdata()) == [w["t1"] for w in s.windows if w["unfamiliar"]]
    differ_ax = next(ax for ax in fig.axes if ax.get_ylabel() == "A ≠ B")
    spans = {to_hex(p.get_facecolor()) for p in differ_ax.patches}
    n_differ = sum(a["decision"] != b["decision"] for a, b in zip(s.windows, s.windows_b))
    assert n_differ and len(spans) == 1
    classes = {c.lower() for c in P.CLASS_COLOURS}
    mark = to_hex(unf[0].get_color())
    assert mark != spans.pop() and mark not in classes
    assert not {to_hex(p.get_facecolor()) for p in differ_ax.patches} & classes


def test_decision_and_raw_changes_are_counted_the_same_way():
    # the decision follows the raw top class two windows late, starting undecided: the
    # same three switches (a, b, a, b), so the report says the same number for both; it
    # said "4 decision changes; the raw top class changes 3 times" (the first decision,
    # made from undecided, counted as a change)
    from monitor.review.metrics import window_metrics

    tops = ["a", "a", "b", "b", "a", "a", "b", "b", "b", "b"]
    decs = [None, None] + tops[:-2]
    windows = [{"i": k, "t0": k * 0.5, "t1": k * 0.5 + 1.0, "probs": [0.5, 0.5],
                "top": t, "decision": d, "truth": None} for k, (t, d) in
               enumerate(zip(tops, decs))]
    m = window_metrics(windows, ["a", "b"])
    assert m.raw_changes == 3 and m.changes == 3
