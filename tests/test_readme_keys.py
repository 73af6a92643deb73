"""Every study-file key the code accepts is documented in the README and read by the code.

Accepted keys come from the parser's own table (bayesdid.study.STUDY_KEYS). A key is documented when
the README shows it in a study-file block (``key = ...``), or names it as ``section.key``, ``[section]
key`` or in backticks. A key is read when the code outside study.py uses the setting it fills (the
attribute or the name listed below): a key that is parsed and then ignored fails here.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from bayesdid.study import STUDY_KEYS

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")
CODE = {p: p.read_text(encoding="utf-8") for p in (ROOT / "bayesdid").rglob("*.py") if p.name != "study.py"}

#: (section, key) -> pattern of the code that reads the setting (outside study.py)
READ_BY = {
    ("", "title"): r"\.title\b",
    ("data", "table"): r"study\.table\b",
    ("data", "period_order"): r"\.period_order\b",
    ("data", "summary"): r"study\.summary\b",
    ("policy", "adopters"): r"policy\.adopters\b",
    ("policy", "target_group"): r"\.target_group\b",
    ("checks", "placebo_lag"): r"\.placebo_lag\b",
}
for _k in ("outcome", "jurisdiction", "period", "group", "unit", "exposure", "trials", "weight", "count", "sd", "se"):
    READ_BY[("data", _k)] = rf"\b(columns|cols|c)\.{_k}\b"
for _k in STUDY_KEYS["model"]:
    READ_BY[("model", _k)] = rf"model\.{_k}\b"
for _k in STUDY_KEYS["sampler"]:
    READ_BY[("sampler", _k)] = rf"(sampler|settings)\.{_k}\b"
for _k in STUDY_KEYS["crosscheck"]:
    READ_BY[("crosscheck", _k)] = rf"\bx\.{_k}\b|crosscheck\.{_k}\b"
READ_BY[("decision", "threshold")] = r"decision\.threshold\b"
READ_BY[("decision", "level")] = r"decision\.level\b"
READ_BY[("trends", "multiples")] = r"trends\.multiples\b"
for _k in STUDY_KEYS["priors"]:
    READ_BY[("priors", _k)] = rf"S\[\"{_k}\"\]"  # the model reads each scale by name
for _k in STUDY_KEYS["wording"]:
    READ_BY[("wording", _k)] = rf"w\.get\(\"{_k}\"\)"

ALL = [(sec, k) for sec, keys in STUDY_KEYS.items() for k in keys]


def documented(section: str, key: str) -> bool:
    pats = (
        [
            rf"`{re.escape(section)}\.{key}`",
            rf"\b{re.escape(section)}\.{key}\b",
            rf"`{key}`",
            rf"^\s*{key}\s*=",
            rf"`{key} = ",
            rf"\[{re.escape(section)}\]`?,? `?{key}\b",
        ]
        if section
        else [rf"^\s*{key}\s*="]
    )
    return any(re.search(p, README, flags=re.M) for p in pats)


@pytest.mark.parametrize("section,key", ALL, ids=[f"{s or 'top'}.{k}" for s, k in ALL])
def test_every_accepted_key_is_documented(section, key):
    assert documented(section, key), f"study key '{section}.{key}' is accepted but the README never shows it"


@pytest.mark.parametrize("section,key", ALL, ids=[f"{s or 'top'}.{k}" for s, k in ALL])
def test_every_accepted_key_is_read(section, key):
    pat = READ_BY.get((section, key))
    assert pat is not None, f"study key '{section}.{key}' is new: say in READ_BY how the code reads it"
    users = [p.relative_to(ROOT) for p, text in CODE.items() if re.search(pat, text)]
    assert users, f"study key '{section}.{key}' is accepted but nothing outside study.py reads it ({pat})"


def test_the_check_can_fail():
    assert not documented("data", "colour_of_the_sky")
    assert not any(re.search(r"columns\.colour_of_the_sky\b", t) for t in CODE.values())
