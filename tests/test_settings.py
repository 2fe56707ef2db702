"""Settings: typos and out-of-range choices are refused at load, the README table is generated."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from tallywave.pipeline.errors import UserError
from tallywave.pipeline.settings import SPEC, load_settings, markdown_table

ROOT = Path(__file__).resolve().parents[1]


def _load(tmp_path: Path, text: str):
    p = tmp_path / "s.toml"
    p.write_text(text, encoding="utf-8")
    return load_settings(p)


def test_readme_settings_table_is_the_generated_one() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    m = re.search(r"<!-- settings-table:[^\n]*-->\n(.*?)\n<!-- /settings-table -->", readme,
                  re.DOTALL)
    assert m, "README has no generated settings table"
    assert m.group(1) == markdown_table(), (
        "README settings table is stale: paste `python -m tallywave.pipeline.settings`")


@pytest.mark.parametrize(("key", "bad"), [
    ("nowcast_method", '"chainladder"'),
    ("nowcast_family", '"negbinomial"'),
    ("ensemble_method", '"avg"'),
])
def test_choice_typos_are_refused_naming_key_value_and_choices(tmp_path: Path, key: str,
                                                                bad: str) -> None:
    with pytest.raises(UserError) as err:
        _load(tmp_path, f"[defaults]\n{key} = {bad}\n")
    msg = str(err.value)
    assert "\n" not in msg
    assert key in msg and bad.strip('"') in msg
    for choice in SPEC[key].choices or ():
        assert choice in msg


def test_model_list_typo_is_refused(tmp_path: Path) -> None:
    with pytest.raises(UserError, match=r"models has 'baselin'.*baseline"):
        _load(tmp_path, '[defaults]\nmodels = ["baselin", "renewal"]\n')
    with pytest.raises(UserError, match="unknown setting signal.cases.modles"):
        _load(tmp_path, '[signal.cases]\nmodles = ["baseline"]\n')


def test_every_choice_setting_accepts_each_of_its_choices(tmp_path: Path) -> None:
    for key, spec in SPEC.items():
        if not spec.choices:
            continue
        for choice in spec.choices:
            # an ensemble needs a member beside it (tested below)
            items = [choice, "renewal"] if choice.startswith("ensemble") else [choice]
            value = (("[" + ", ".join(f'"{c}"' for c in items) + "]")
                     if isinstance(spec.default, list) else f'"{choice}"')
            s = _load(tmp_path, f"[signal.deaths]\n{key} = {value}\n")
            got = s.get(key, "deaths")
            assert got == (items if isinstance(spec.default, list) else choice)


def test_an_ensemble_without_members_is_refused(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="ensemble but names none of its members"):
        _load(tmp_path, '[defaults]\nmodels = ["baseline", "ensemble"]\n')
