"""One bundle, one set of numbers: the headline, summary.json, the CSV tables and report.html agree.

A reader meets the same quantity in several places: the "Result" table at the top of report.html (written
by pipeline._headline from the summary), summary.json, the CSV tables (domains.csv, walls.csv,
contrast.csv, domain_contrast.csv, types.csv, twist_domains.csv) and the report's folded table of
every summary number. Each test reads the written files back (not the in-memory analysis) and
checks one quantity everywhere it appears. Two demo bundles: the commensurate 3x3 CDW scene with
two bias maps, and the moiré scene with two twist domains.

What "agree" means (derived from how each place prints a number): a CSV cell and summary.json hold
the full float (their values agree to float rounding, rel 1e-12); a printed value agrees with the
full one to half a unit of its last printed digit; a value printed with an error carries as many
decimals as the error's two significant digits (otherwise the printed value can be off by more than
the rounding of its error: common practice, no source); counts agree exactly.
"""

import csv
import html
import json
import math
import re

import numpy as np
import pytest

from domains import pipeline
from domains.io import read_bundle
from domains.report import format_cell, split_column_name

pytestmark = pytest.mark.slow

NUMBER = r"[-−+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?"


def _float(text):
    return float(text.replace("−", "-"))


def _csv(bundle, name):
    with open(bundle / name, newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def _cell(text):
    """A CSV cell as written (docs/bundle.md): empty for a missing value, true/false for flags."""
    if text == "":
        return math.nan
    if text in ("true", "false"):
        return text == "true"
    return float(text)


def _table_after(page, heading):
    """Rows (first cell -> second cell, as shown) of the first table after ``heading`` in report.html."""
    start = page.index(heading)
    end = page.index("</table>", start)
    rows = re.findall(r"<tr><td>(.*?)</td><td>(.*?)</td></tr>", page[start:end], re.S)
    return {html.unescape(k): html.unescape(v) for k, v in rows}


def _decimals(printed):
    mantissa = printed.split("e")[0]
    return len(mantissa.split(".")[1]) if "." in mantissa else 0


def _printed_matches(printed, value):
    """The printed number is the value rounded to the digits shown (derived: half a unit of the last one)."""
    exponent = int(printed.split("e")[1]) if "e" in printed else 0
    unit = 10.0 ** (exponent - _decimals(printed))
    return abs(_float(printed) - value) <= 0.5 * unit * (1 + 1e-9)


def _check_value_with_error(printed_value, printed_error, value, error):
    """A printed 'v ± e': e is the error to two significant digits and v the value rounded to the same
    last digit (derived: u = 10^(floor(log10 e) - 1) is that digit's unit; both are within u / 2)."""
    unit = 10.0 ** (math.floor(math.log10(error)) - 1)
    assert abs(_float(printed_error) - error) <= 0.5 * unit * (1 + 1e-9), (printed_error, error)
    assert abs(_float(printed_value) - value) <= 0.5 * unit * (1 + 1e-9), (printed_value, value, error)


def _bundle(tmp_path_factory, scene):
    report = pipeline.run_demo(tmp_path_factory.mktemp(scene) / "bundle", scene=scene, progress=False)
    bundle = report.parent
    page = report.read_text(encoding="utf-8")
    return {"path": bundle, "summary": json.loads((bundle / "summary.json").read_text(encoding="utf-8")),
            "page": page, "headline": _table_after(page, "<h2>Result</h2>"),
            "all_numbers": _table_after(page, "All numbers (summary.json)"),
            "domains": _csv(bundle, "domains.csv"), "walls": _csv(bundle, "walls.csv")}


@pytest.fixture(scope="module")
def cdw(tmp_path_factory):
    return _bundle(tmp_path_factory, "cdw")


@pytest.fixture(scope="module")
def moire(tmp_path_factory):
    return _bundle(tmp_path_factory, "moire")


@pytest.fixture(params=["cdw", "moire"])
def bundle(request):
    return request.getfixturevalue(request.param)


# ----------------------------------------------------------------------------- every bundle


def test_the_page_shows_the_headline_of_the_written_summary(bundle):
    # The Result table of report.html is pipeline._headline of summary.json as written (JSON keeps float64
    # exactly, so the headline of the file is the one of the analysis): same rows, same words.
    expected = {k: format_cell(v) for k, v in pipeline._headline(bundle["summary"]).items()}
    assert bundle["headline"] == expected


def test_the_page_lists_every_summary_number_as_stored(bundle):
    # The folded table of report.html holds each scalar of summary.json, formatted by report.format_cell
    # (4 significant digits): each shown value is the stored one rounded (derived: half a unit of the last digit).
    shown = bundle["all_numbers"]
    checked = 0

    def walk(block, prefix=""):
        nonlocal checked
        for key, value in block.items():
            name = f"{prefix}{key}"
            if key in ("choices", "notes"):
                continue
            if isinstance(value, dict):
                walk(value, name + ".")
            elif isinstance(value, (int, float)) and not isinstance(value, bool) and name in shown:
                text = shown[name]
                if value is None or not math.isfinite(value):
                    assert text == "–", name
                else:
                    assert _printed_matches(text, value), (name, text, value)
                checked += 1

    walk(bundle["summary"])
    assert checked >= 20  # the summary has dozens of scalars; the walk did reach them


def test_domain_count_and_cut_by_frame_agree_with_domains_csv(bundle):
    rows, summary = bundle["domains"], bundle["summary"]["domains"]
    m = re.fullmatch(rf"(\d+) \((\d+) cut by the frame\), mean area ({NUMBER}) ± ({NUMBER}) nm²",
                     bundle["headline"]["domains"])
    assert m, bundle["headline"]["domains"]
    count, cut = int(m.group(1)), int(m.group(2))
    # counts: exact, everywhere
    assert count == summary["count"] == len(rows)
    assert cut == summary["count_touching_edge"] == sum(_cell(r["touches_edge"]) for r in rows)
    # the mean area is the mean of the area column over all domains (measure.domain_summary: cut ones included)
    areas = np.array([_cell(r["area_nm2"]) for r in rows])
    assert summary["area_nm2_mean"] == pytest.approx(areas.mean(), rel=1e-12)
    interior = areas[[not _cell(r["touches_edge"]) for r in rows]]
    if interior.size:
        assert summary["area_nm2_mean_interior"] == pytest.approx(interior.mean(), rel=1e-12)
    else:
        assert summary["area_nm2_mean_interior"] is None
    _check_value_with_error(m.group(3), m.group(4), areas.mean(), summary["area_nm2_mean_err"])


def test_wall_count_length_and_widths_agree_with_walls_csv(bundle):
    walls, summary = bundle["walls"], bundle["summary"]["domains"]
    text = bundle["headline"]["walls"]
    m = re.fullmatch(rf"(\d+) segments?, ({NUMBER}) nm in all, width (.*)", text)
    assert m, text
    assert int(m.group(1)) == summary["wall_count"] == len(walls)
    lengths = [_cell(w["length_nm"]) for w in walls]
    assert summary["wall_length_nm"] == pytest.approx(sum(lengths), rel=1e-12)
    assert _printed_matches(m.group(2), sum(lengths))
    resolved = [w for w in walls if _cell(w["width_resolved"])]
    unresolved = [w for w in walls if not _cell(w["width_resolved"])]
    # A resolved wall has a width and its error, no limit; an unresolved one the reverse (docs/bundle.md).
    for w in resolved:
        assert math.isfinite(_cell(w["width_nm"])) and math.isfinite(_cell(w["width_nm_err"]))
        assert math.isnan(_cell(w["width_nm_upper_limit"]))
    for w in unresolved:
        assert math.isnan(_cell(w["width_nm"])) and math.isnan(_cell(w["width_nm_err"]))
    limits = [_cell(w["width_nm_upper_limit"]) for w in unresolved if math.isfinite(_cell(w["width_nm_upper_limit"]))]
    assert summary["wall_width_count_resolved"] == len(resolved)
    assert summary["wall_width_count_unresolved"] == len(limits)
    width = m.group(3)
    if resolved:
        mean = float(np.mean([_cell(w["width_nm"]) for w in resolved]))
        assert summary["wall_width_nm_mean"] == pytest.approx(mean, rel=1e-12)
        mw = re.match(rf"({NUMBER}) ± ({NUMBER}) nm", width)
        assert mw, width
        _check_value_with_error(mw.group(1), mw.group(2), mean, summary["wall_width_nm_mean_err"])
    else:
        assert summary["wall_width_nm_mean"] is None and not re.search(r"±", width)
    if limits:
        # the largest per-wall limit bounds every unresolved wall (measure.domain_summary)
        assert summary["wall_width_nm_upper_limit"] == pytest.approx(max(limits), rel=1e-12)
        ml = re.search(rf"below ({NUMBER}) nm \((\d+) narrower than the lock-in resolves\)", width)
        assert ml, width
        assert _printed_matches(ml.group(1), max(limits)) and int(ml.group(2)) == len(limits)
        if resolved:
            assert f"({len(resolved)} resolved)" in width
    else:
        assert "below" not in width
    # every wall joins two domains of domains.csv
    ids = {int(r["domain"]) for r in bundle["domains"]}
    assert all({int(w["domain_a"]), int(w["domain_b"])} <= ids for w in walls)


def _typed(text):
    """A CSV cell as the analysis held it: None (empty), bool, int, float or text."""
    if text == "":
        return None
    if text in ("true", "false"):
        return text == "true"
    if re.fullmatch(r"-?\d+", text):
        return int(text)
    try:
        return float(text)
    except ValueError:
        return text


def _html_tables(page):
    """Each '<h3>heading</h3><table>' of report.html: heading -> (columns, rows of shown cells)."""
    out = {}
    for heading, body in re.findall(r"<h3>(.*?)</h3><table>(.*?)</table>", page, re.S):
        columns = [html.unescape(c) for c in re.findall(r"<th>(.*?)</th>", body)]
        rows = [[html.unescape(c) for c in re.findall(r"<td>(.*?)</td>", r)]
                for r in re.findall(r"<tr>(<td>.*?)</tr>", body, re.S)]
        out[html.unescape(heading)] = (columns, rows)
    return out


#: The report's tables and the CSV files that hold the same rows.
TABLE_FILES = {"Domains": "domains.csv", "Walls": "walls.csv", "Twist domains": "twist_domains.csv",
               "Walls between twist domains": "walls.csv"}


def test_the_page_tables_show_the_csv_rows(bundle):
    # report.html's Domains / Walls / Twist domains tables and the CSV files: the same rows, each cell the
    # CSV value as report.format_cell prints it; a list column of the page ("a, b, c") is the CSV's
    # split columns (report.split_column_name) in order.
    tables = _html_tables(bundle["page"])
    shown = [h for h in tables if h in TABLE_FILES]
    assert shown  # the page has at least the domain and wall tables
    for heading in shown:
        columns, rows = tables[heading]
        written = _csv(bundle["path"], TABLE_FILES[heading])
        assert len(rows) == len(written), heading
        header = list(written[0]) if written else []
        for shown_row, row in zip(rows, written):
            for column, cell in zip(columns, shown_row):
                if column in header:
                    expected = format_cell(_typed(row[column]))
                else:
                    parts = []
                    while (name := split_column_name(column, len(parts) + 1)) in header:
                        parts.append(_typed(row[name]))
                    expected = format_cell(parts) if parts else "–"
                assert cell == expected, (heading, column, cell, expected)


def test_domains_csv_counts_the_pixels_of_the_labels_map(bundle):
    # maps.zarr/labels (the input grid) and domains.csv: n_pixels is the label's pixel count and the area
    # that count times the pixel area (derived)
    labels = read_bundle(bundle["path"]).maps["labels"]
    dy, dx = labels.attrs["pixel_size_nm"]
    counts = np.bincount(np.asarray(labels).ravel())
    for row in bundle["domains"]:
        n = counts[int(row["domain"])]
        assert int(row["n_pixels"]) == n
        assert _cell(row["area_nm2"]) == pytest.approx(n * dy * dx, rel=1e-12)


# ----------------------------------------------------------------------------- the CDW bundle


def test_cdw_lattice_as_printed_agrees_with_the_summary(cdw):
    lattice = cdw["summary"]["lattice"]
    m = re.fullmatch(rf"hexagonal, a = ({NUMBER}) ± ({NUMBER}) nm, angle ({NUMBER}) ± ({NUMBER}) deg",
                     cdw["headline"]["lattice"])
    assert m, cdw["headline"]["lattice"]
    _check_value_with_error(m.group(1), m.group(2), lattice["a_nm"], lattice["a_nm_err"])
    _check_value_with_error(m.group(3), m.group(4), lattice["angle_deg"], lattice["angle_deg_err"])
    # the folded summary table shows the same four numbers (4 significant digits)
    for key in ("a_nm", "a_nm_err", "angle_deg", "angle_deg_err"):
        assert _printed_matches(cdw["all_numbers"][f"lattice.{key}"], lattice[key])


def test_cdw_defect_counts_agree(cdw):
    defects = cdw["summary"]["defects"]
    m = re.fullmatch(r"(\d+) \((\d+) with winding \+1, (\d+) with -1\)", cdw["headline"]["defects"])
    assert m, cdw["headline"]["defects"]
    windings = [d["winding"] for d in defects["list"]]
    # derived: each defect has winding +1 or -1, so the two counts add up to the total
    assert int(m.group(1)) == defects["count"] == len(windings) == cdw["summary"]["domains"]["defect_count"]
    assert int(m.group(2)) == defects["positive"] == windings.count(1)
    assert int(m.group(3)) == defects["negative"] == windings.count(-1)


def test_cdw_contrast_tables_describe_the_domains_of_domains_csv(cdw):
    bundle, summary = cdw["path"], cdw["summary"]
    domains = {int(r["domain"]): r for r in cdw["domains"]}
    contrast = _csv(bundle, "contrast.csv")
    biases = sorted({float(r["bias_V"]) for r in contrast})
    assert len(biases) == 2  # the demo scene has two bias maps
    for bias in biases:
        rows = [r for r in contrast if float(r["bias_V"]) == bias]
        # one row per domain at each bias, with that domain's area and pixel count
        assert sorted(int(r["domain"]) for r in rows) == sorted(domains)
        for r in rows:
            d = domains[int(r["domain"])]
            assert _cell(r["area_nm2"]) == pytest.approx(_cell(d["area_nm2"]), rel=1e-12)
            assert int(r["n_pixels"]) == int(d["n_pixels"])
    for r in _csv(bundle, "domain_contrast.csv"):
        assert _cell(r["area_nm2"]) == pytest.approx(_cell(domains[int(r["domain"])]["area_nm2"]), rel=1e-12)
    # the headline's verdict counts are the summary's per-domain verdicts, one per domain
    for pair in summary["bias_comparison"]["pairs"]:
        name = f"contrast {pair['bias_1_V']:+.2f} V vs {pair['bias_2_V']:+.2f} V"
        counts = dict((v, int(n)) for n, v in re.findall(r"(\d+) (\w+)", cdw["headline"][name]))
        verdicts = [d["verdict"]["verdict"] for d in pair["domains"]]
        assert counts == {v: verdicts.count(v) for v in set(verdicts)}
        assert sorted(d["domain"] for d in pair["domains"]) == sorted(domains)


def test_cdw_electronic_types_cover_the_domains_once(cdw):
    domains = {int(r["domain"]): _cell(r["area_nm2"]) for r in cdw["domains"]}
    types = _csv(cdw["path"], "types.csv")
    members = []
    for t in types:
        ids = [int(float(v)) for k, v in t.items() if k.startswith("member_") and v != ""]
        assert int(t["n_domains"]) == len(ids)
        assert _cell(t["area_nm2"]) == pytest.approx(sum(domains[i] for i in ids), rel=1e-12)
        members += ids
    assert sorted(members) == sorted(domains)  # each domain in exactly one type
    sentence = cdw["headline"]["electronic types"]
    m = re.match(r"(\d+) electronic types?", sentence)
    assert m and int(m.group(1)) == len(types), sentence
    if len(types) == 1:
        assert f"all {len(domains)} domains" in sentence


# ----------------------------------------------------------------------------- the moiré bundle


def _levels(text, unit):
    return [(a, b, float(c)) for a, b, c in re.findall(rf"({NUMBER}) ± ({NUMBER}) {unit} \((\d+) %\)", text)]


def test_moire_twist_per_domain_agrees_everywhere(moire):
    twist_rows = _csv(moire["path"], "twist_domains.csv")
    domains = {int(r["domain"]): r for r in moire["domains"]}
    summary = moire["summary"]["moire"]
    # twist_domains.csv and domains.csv: the same domains, areas and (rounded in the state) twists
    assert sorted(int(r["id"]) for r in twist_rows) == sorted(domains)
    for r in twist_rows:
        d = domains[int(r["id"])]
        assert _cell(r["area_nm2"]) == pytest.approx(_cell(d["area_nm2"]), rel=1e-12)
        assert _cell(r["touches_edge"]) == _cell(d["touches_edge"])
        m = re.fullmatch(rf"twist ({NUMBER}) deg", d["state"])
        assert m and _printed_matches(m.group(1), _cell(r["twist_deg"])), d["state"]
    text = moire["headline"]["twist angle"]
    assert f"({len(twist_rows)} twist domains)" in text and summary["twist_domains"] == len(twist_rows)
    # one level per domain here (two bands), each the domain's twist with its error and area fraction
    levels = _levels(text, "deg")
    assert len(levels) == len(twist_rows) == len(summary["twist_deg_levels"])
    for (value, error, percent), row in zip(sorted(levels, key=lambda v: _float(v[0])),
                                            sorted(twist_rows, key=lambda r: _cell(r["twist_deg"]))):
        _check_value_with_error(value, error, _cell(row["twist_deg"]), _cell(row["twist_deg_err"]))
        assert percent == round(100 * _cell(row["area_fraction"]))
    period = _levels(moire["headline"]["moiré period"], "nm")
    for (value, error, _), row in zip(sorted(period, key=lambda v: _float(v[0])),
                                      sorted(twist_rows, key=lambda r: _cell(r["period_nm"]))):
        _check_value_with_error(value, error, _cell(row["period_nm"]), _cell(row["period_nm_err"]))


def test_moire_heterostrain_as_printed_agrees_with_the_summary(moire):
    summary = moire["summary"]["moire"]
    text = moire["headline"]["heterostrain"]
    m = re.match(rf"({NUMBER}) ± ({NUMBER}) %", text)
    assert m, text
    _check_value_with_error(m.group(1), m.group(2), summary["heterostrain_percent"], summary["heterostrain_percent_err"])
    ma = re.search(rf"along ({NUMBER}) ± ({NUMBER}) deg", text)
    if ma:
        _check_value_with_error(ma.group(1), ma.group(2), summary["heterostrain_angle_deg"],
                                summary["heterostrain_angle_deg_err"])
