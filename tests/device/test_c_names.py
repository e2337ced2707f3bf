"""Class names reach generated C only as escaped string literals: whatever a card names its
classes (a trigraph ``??/``, a comment's end ``*/``, quotes, backslashes, a newline, UTF-8),
the header compiles to the same program, whose names are the card's bytes. ISO C99 5.2.1.1
(trigraph sequences, replaced in strict C99 mode: gcc -std=c99) and 6.4.4.4 (escape
sequences). Failed before its fix."""

import subprocess

import pytest

from conftest import card_dict, compiler

NAMES = ["a??/", "b*/ int x; /*", 'c"\\', "d\nnext", "é ü", "??=??(??)"]


@pytest.mark.system
def test_hostile_class_names_compile_to_the_same_names(tmp_path):
    from monitor.device.constants import header
    from monitor.features.card import card_from_dict

    card = card_from_dict(card_dict(classes=NAMES))
    (tmp_path / "frontend_constants.h").write_text(header(card))
    (tmp_path / "names.c").write_text(
        '#include <stdio.h>\n#include "frontend_constants.h"\n'
        "int main(void) {\n"
        "  for (int i = 0; i < SM_N_CLASSES; i++) {\n"
        "    for (const unsigned char *p = (const unsigned char *)sm_class_names[i]; *p; p++)\n"
        '      printf("%02x", *p);\n'
        '    printf("\\n");\n'
        "  }\n  return 0;\n}\n")
    exe = tmp_path / "names"
    r = subprocess.run([compiler(), "-std=c99", "-trigraphs", "-Wall", "-Wextra", "-Werror",
                        "-Wno-unused-const-variable", "-Wno-unused-variable",
                        "-o", str(exe), str(tmp_path / "names.c"), "-lm"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    out = subprocess.run([str(exe)], capture_output=True, text=True, check=True).stdout
    assert out.split() == [n.encode().hex() for n in NAMES]


def test_the_header_holds_no_name_outside_a_string_literal():
    from monitor.device.constants import header
    from monitor.features.card import card_from_dict

    text = header(card_from_dict(card_dict(classes=NAMES)))
    for line in text.splitlines():
        assert "??" not in line and "*/ int" not in line, line
