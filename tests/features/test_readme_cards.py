"""Every model card the README shows loads as written (a reader copies them). Failed before
its fix: `mean = [ ... ]` is not TOML, and `mfcc = 13` is refused for kind = "logmel"."""

import re

from conftest import ROOT
from monitor.features.card import tomllib  # Python 3.11+: the standard library's; else tomli


def test_every_card_in_the_readme_loads_as_written():
    from monitor.features.card import card_from_dict

    text = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```toml\n(.*?)```", text, re.S)
    cards = [b for b in blocks if "[audio]" in b and "[frontend]" in b]
    assert cards, "the README shows no card"
    for block in cards:
        card = card_from_dict(tomllib.loads(block))  # Python's own TOML 1.0 reader
        assert card.classes and card.feature_shape
