"""User text on screen is shown literally: a snippet's reason or a class name that the
terminal library would read as markup (Rich's console markup: ``[bold]``, ``[/]``) or an
escape sequence. Failed before its fix (the relabel view crashed, exit 0)."""

import asyncio
import json
import shutil

import pytest

from conftest import MODELS, run_cli
from monitor.ui.app import RelabelApp

HOSTILE = ("[/]", "[bold]x", "a\x1b[31mred")


@pytest.fixture(scope="module")
def short_session(tour, tmp_path_factory):
    out = tmp_path_factory.mktemp("hx") / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--truth", tour[1],
                "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
    return out


def test_relabel_view_shows_markup_in_reasons_and_labels_literally(short_session, tmp_path):
    out = tmp_path / "s"
    shutil.copytree(short_session, out)
    sides = sorted((out / "snippets").glob("*/*.json"))
    assert len(sides) >= 3
    for side, text in zip(sides, HOSTILE):
        m = json.loads(side.read_text())
        m["reason"], m["label"], m["predicted"] = text, text, text
        side.write_text(json.dumps(m))
    classes = ["[/]", "[bold]quiet", "voices", "traffic"]
    app = RelabelApp(out, classes)
    shown = []

    async def drive():
        async with app.run_test(size=(120, 30)) as pilot:
            await pilot.pause(0.5)
            from textual.widgets import DataTable

            table = app.screen.query_one(DataTable)
            for r in range(table.row_count):
                shown.append([str(c) for c in table.get_row_at(r)])
            await pilot.press("escape")
            await pilot.pause(0.2)

    asyncio.run(drive())
    text = "\n".join(" ".join(row) for row in shown)
    assert "[/]" in text and "[bold]" in text
    assert "\x1b" not in text
