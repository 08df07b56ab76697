"""The documentation in docs/ matches the code: every cited file and section exists, every bundle key is described.

Citations in ``domains/`` and ``napari_plugin/`` name a page and a section (``docs/methods.md §8``); a
renamed page or a renumbered section would leave them pointing nowhere. ``docs/bundle.md`` must
describe every key a run writes to ``summary.json`` and every column of its tables.
"""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"
#: Where citations are looked for (this file excepted: it cites missing pages on purpose).
CODE_DIRS = ("domains", "napari_plugin", "tests", "examples", "benchmarks")

#: "docs/methods.md §5, §6" -> page "methods.md", sections "§5, §6".
CITATION = re.compile(r"docs/([A-Za-z0-9_\-]+\.md)((?:\s*(?:,|and|&)?\s*§\s*\d+)*)")
SECTION_NUMBER = re.compile(r"§\s*(\d+)")


def citations(files):
    """(file, line number, page, [section numbers]) of every docs/ citation in ``files``."""
    found = []
    for file in files:
        for number, line in enumerate(file.read_text(encoding="utf-8").splitlines(), start=1):
            for match in CITATION.finditer(line):
                found.append((file, number, match.group(1), [int(n) for n in SECTION_NUMBER.findall(match.group(2))]))
    return found


def page_sections(page: Path) -> set[int]:
    """Section numbers that a page defines as headings ("## §3 ..." or "### §3 ...")."""
    return {int(n) for n in re.findall(r"^#{1,6}\s*§\s*(\d+)\b", page.read_text(encoding="utf-8"), re.MULTILINE)}


def broken_citations(found, docs_dir: Path) -> list[str]:
    """Human-readable list of citations whose page or section does not exist under ``docs_dir``."""
    problems = []
    for file, number, page, sections in found:
        where = f"{file}:{number}"
        path = docs_dir / page
        if not path.is_file():
            problems.append(f"{where}: docs/{page} does not exist")
            continue
        missing = sorted(set(sections) - page_sections(path))
        if missing:
            problems.append(f"{where}: docs/{page} has no section {', '.join(f'§{n}' for n in missing)}")
    return problems


def code_files():
    return sorted(f for d in CODE_DIRS if (ROOT / d).is_dir() for f in (ROOT / d).rglob("*.py")
                  if f.resolve() != Path(__file__).resolve())


def test_every_cited_page_and_section_exists():
    found = citations(code_files())
    # The code cites the methods page today (e.g. the lattice choice, docs/methods.md §8): an empty
    # list would mean the pattern no longer matches, and the check below would pass vacuously.
    assert any(page == "methods.md" and sections for _, _, page, sections in found)  # common practice, no source
    assert broken_citations(found, DOCS) == []  # common practice, no source: a citation must lead somewhere


def test_the_citation_check_fails_on_a_missing_page_or_section(tmp_path):
    # The check itself must be able to fail (a test that cannot fail is a defect).
    source = tmp_path / "cites.py"
    source.write_text('"""See docs/methods.md §2, §99 and docs/nowhere.md §1; also docs/bundle.md."""\n', encoding="utf-8")
    found = citations([source])
    assert [(page, sections) for _, _, page, sections in found] == [
        ("methods.md", [2, 99]), ("nowhere.md", [1]), ("bundle.md", [])]  # derived: the string above
    problems = broken_citations(found, DOCS)
    assert len(problems) == 2  # derived: §99 and nowhere.md are missing, the rest exists
    assert "§99" in problems[0] and "nowhere.md" in problems[1]  # derived: the string above


def test_methods_keeps_the_section_numbers_one_to_ten():
    # Code written against the earlier working notes cites §1 ... §10; the numbering must stay.
    assert page_sections(DOCS / "methods.md") >= set(range(1, 11))  # common practice, no source


# --------------------------------------------------------------------------- the bundle schema


def _section(text: str, heading: str) -> str:
    """The text of the markdown section whose heading line contains ``heading``, up to the next heading
    of the same or a higher level."""
    lines = text.splitlines()
    for i, line in enumerate(lines):
        m = re.match(r"^(#{1,6})\s", line)
        if m and heading in line:
            level = len(m.group(1))
            body = []
            for nxt in lines[i + 1:]:
                n = re.match(r"^(#{1,6})\s", nxt)
                if n and len(n.group(1)) <= level:
                    break
                body.append(nxt)
            return "\n".join(body)
    raise AssertionError(f"docs/bundle.md has no section {heading!r}")


def _named(text: str) -> set[str]:
    """Names written as code (`name`) in a piece of markdown."""
    return set(re.findall(r"`([A-Za-z0-9_]+)`", text))


def _generic(column: str) -> str:
    """The name under which a column is described: numbered columns once, per-bias columns once.

    amplitude_q3_se -> amplitude_q1_se; member_4 -> member_1; contrast_nS_at_-0.25V_se ->
    contrast_UNIT_at_BIASV_se (UNIT: the maps' unit, BIAS: the signed bias of a map).
    """
    column = re.sub(r"_q\d+", "_q1", column)
    column = re.sub(r"^member_\d+$", "member_1", column)
    column = re.sub(r"^((?:amplitude_q1|amplitude_total|map_mean))_(?!se$)[A-Za-z0-9_]+?(_se)?$", r"\1_UNIT\2", column)
    return re.sub(r"^((?:amplitude_)?(?:mean|contrast|frame_contrast))_.+_at_[+-]\d+\.\d+V(_se)?$",
                  r"\1_UNIT_at_BIASV\2", column)


@pytest.fixture(scope="module")
def small_bundle(tmp_path_factory):
    """A demo bundle from a small CDW scene with two bias maps (a few seconds instead of the full demo)."""
    from domains import pipeline, synth

    out = tmp_path_factory.mktemp("docs") / "bundle"
    original = pipeline.make_scene

    def small_scene(kind, *, seed=7):
        if kind == "cdw":
            return synth.cdw_scene(shape=(192, 192), n_domains=3, rng=seed)
        return original(kind, seed=seed)

    pipeline.make_scene = small_scene
    try:
        pipeline.run_demo(out, scene="cdw", progress=False)
    finally:
        pipeline.make_scene = original
    return out


def test_every_summary_key_is_described(small_bundle):
    text = (DOCS / "bundle.md").read_text(encoding="utf-8")
    summary = json.loads((small_bundle / "summary.json").read_text(encoding="utf-8"))
    top = _section(text, "Top level")
    top_rows = set(re.findall(r"^\|\s*`([A-Za-z0-9_]+)`", top, re.MULTILINE))
    assert set(summary) - top_rows == set()  # common practice, no source: the schema lists every top-level key
    # The demo's scene gives a lattice, a 3x3 order, domains and a bias comparison: their blocks exist.
    for block in ("lattice", "superlattice", "domains", "defects", "bias_comparison", "drift", "choices"):
        assert isinstance(summary[block], dict)  # derived: the scene is a 3x3 CDW with two maps
        described = _named(_section(text, f"`{block}`"))
        assert set(summary[block]) - described == set(), block  # common practice, no source
    families = summary["superlattice"]["families"]
    assert families  # derived: the scene holds one triple-q family
    described = _named(_section(text, "`superlattice`"))
    assert set().union(*map(set, families)) - described == set()  # common practice, no source
    pair_domain = summary["bias_comparison"]["pairs"][0]["domains"][0]
    described = _named(_section(text, "`bias_comparison`"))
    assert (set(pair_domain) | set(pair_domain["verdict"])) - described == set()  # common practice, no source


def test_every_table_column_and_map_is_described(small_bundle):
    text = (DOCS / "bundle.md").read_text(encoding="utf-8")
    written = sorted(p.stem for p in small_bundle.glob("*.csv"))
    # derived: the scene has order, domains, walls and two maps, hence contrasts and electronic types
    assert written == ["contrast", "domain_contrast", "domains", "types", "walls"]
    for table in written:
        file = small_bundle / f"{table}.csv"
        with open(file, newline="", encoding="utf-8") as handle:
            columns, *rows = list(csv.reader(handle))
        described = _named(_section(text, f"{table}.csv"))
        assert {_generic(c) for c in columns} - described == set(), table  # common practice, no source
        # issue 14: one value per cell (no "1.8;-1.6;-0.4")
        assert not [cell for row in rows for cell in row if ";" in cell], table
    with open(small_bundle / "domains.csv", newline="", encoding="utf-8") as handle:
        header = next(csv.reader(handle))
    # derived: a 3x3 CDW has three order components, hence three phase columns
    assert [c for c in header if c.startswith("mean_phase")] == [f"mean_phase_q{j}_deg" for j in (1, 2, 3)]
    maps = _section(text, "maps.zarr")
    arrays = {p.parent.relative_to(small_bundle / "maps.zarr").as_posix()
              for p in (small_bundle / "maps.zarr").rglob("zarr.json")
              if json.loads(p.read_text())["node_type"] == "array"}
    generic = {re.sub(r"/(cdw|stripe)_\d+$", "/<name>", a) for a in arrays}
    assert {a for a in generic if f"`{a}`" not in maps} == set()  # common practice, no source
    provenance = json.loads((small_bundle / "provenance.json").read_text(encoding="utf-8"))
    assert set(provenance) - _named(_section(text, "provenance.json")) == set()  # common practice, no source
