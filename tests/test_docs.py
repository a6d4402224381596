"""docs/spec.md lists exactly the keys forebear.core.spec accepts, with the defaults of defaults.yaml."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest
import yaml

from forebear.core import spec as spec_mod

ROOT = Path(__file__).resolve().parents[1]
SPEC_MD = ROOT / "docs" / "spec.md"
MARKER = re.compile(r"^<!-- keys: (\S+) -->$")
ROW = re.compile(r"^\|\s*`([^`]+)`\s*\|([^|]*)\|([^|]*)\|")


def _sections() -> dict[str, dict[str, str]]:
    """{section: {key: default cell}} from the tables that follow each ``<!-- keys: X -->`` marker."""
    out: dict[str, dict[str, str]] = {}
    current: str | None = None
    for line in SPEC_MD.read_text().splitlines():
        m = MARKER.match(line.strip())
        if m:
            current = "" if m.group(1) == "(top)" else m.group(1)
            assert current not in out, f"docs/spec.md: section {m.group(1)} appears twice"
            out[current] = {}
            continue
        if current is None:
            continue
        row = ROW.match(line.strip())
        if row:
            key = row.group(1)
            assert key not in out[current], f"docs/spec.md: {current}.{key} is listed twice"
            out[current][key] = row.group(3).strip()
        elif not line.startswith("|") and out[current]:
            current = None  # the table ended
    return out


def _leaves(d: dict[str, Any], prefix: tuple[str, ...] = ()) -> dict[tuple[str, ...], Any]:
    out: dict[tuple[str, ...], Any] = {}
    for k, v in d.items():
        if isinstance(v, dict) and v:
            out.update(_leaves(v, (*prefix, k)))
        else:
            out[(*prefix, k)] = v
    return out


def test_spec_md_lists_exactly_the_accepted_keys() -> None:
    documented = _sections()
    accepted = spec_mod.accepted_keys()
    assert set(documented) == set(accepted), "sections differ from spec.accepted_keys()"
    for section, keys in accepted.items():
        doc_keys = set(documented[section])
        missing = set(keys) - doc_keys
        extra = doc_keys - set(keys)
        assert not missing, f"docs/spec.md section {section or '(top)'} misses {sorted(missing)}"
        assert not extra, f"docs/spec.md section {section or '(top)'} lists unknown keys {sorted(extra)}"


def _section_of(path: tuple[str, ...]) -> tuple[str, str]:
    """defaults.yaml path -> (docs section, key)."""
    *head, key = path
    return ".".join(head), key


def test_spec_md_defaults_match_defaults_yaml() -> None:
    documented = _sections()
    leaves = _leaves(spec_mod.DEFAULTS)
    assert leaves, "defaults.yaml is empty?"
    for path, value in leaves.items():
        section, key = _section_of(path)
        assert section in documented and key in documented[section], f"default {'.'.join(path)} is not documented"
        cell = documented[section][key]
        m = re.match(r"`([^`]*)`", cell)
        assert m, f"docs/spec.md {'.'.join(path)}: the default column must start with the value in backticks, got {cell!r}"
        assert yaml.safe_load(m.group(1)) == value, f"docs/spec.md {'.'.join(path)}: documents {m.group(1)!r}, defaults.yaml has {value!r}"


def test_spec_md_example_is_a_valid_spec(tmp_path: Path) -> None:
    text = SPEC_MD.read_text()
    block = re.search(r"## A complete example\s+```yaml\n(.*?)```", text, re.S)
    assert block, "docs/spec.md lost its complete example"
    path = tmp_path / "search.yaml"
    path.write_text(block.group(1))
    s = spec_mod.load(path)
    assert s.name == "store-17-demand"
    assert [p.name for p in s.space.params] == ["learning_rate", "depth", "subsample", "booster"]
    assert s.budget.trial_timeout == 20 * 60 and s.budget.wall_time == 6 * 3600


@pytest.mark.parametrize("doc", ["architecture.md", "operations.md", "spec.md"])
def test_docs_exist_and_link_only_to_files_that_exist(doc: str) -> None:
    path = ROOT / "docs" / doc
    text = path.read_text()
    assert len(text) > 2000, f"docs/{doc} looks empty"
    for target in re.findall(r"\]\(([^)#\s]+)(?:#[^)]*)?\)", text):
        if "://" in target:
            continue
        assert (path.parent / target).exists(), f"docs/{doc} links to {target}, which does not exist"


def test_readme_test_command_is_the_one_ci_runs() -> None:
    """.ci/run runs the README's test command verbatim; the two must not drift apart."""
    ci = [ln for ln in (ROOT / ".ci" / "run").read_text().splitlines() if ln.startswith("python3 -m venv")]
    assert len(ci) == 1, ci
    readme = (ROOT / "README.md").read_text()
    assert f"```bash\n{ci[0]}\n```" in readme
    assert ci[0].endswith("python -m pytest -q")
    # The demo command sets itself up the same way and then runs the demo.
    demo = ci[0].rsplit(" && ", 1)[0] + " && forebear demo"
    assert f"```bash\n{demo}\n```" in readme
    assert readme.index("forebear demo") > 0 and readme.splitlines()[2].startswith("forebear is for")
