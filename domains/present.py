"""Presentation of a finished analysis: the report's figures and sections, drawn after the run.

:func:`domains.pipeline.analyze` returns data only (numbers, maps, tables) and, in
``Analysis.views``, the small arrays and result objects the pictures are drawn from
(every image already reduced to at most :data:`domains.report.FIGURE_MAX_PX` pixels a
side). This module turns those into PNG figures with captions and HTML tables
(:func:`present`); :func:`domains.pipeline.write_analysis` calls it when the bundle is
written. Nothing here computes physics: a figure shows what the analysis measured.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from . import report

__all__ = ["Presentation", "present"]


@dataclass
class Presentation:
    """The report's pictures: ``figures`` maps a name to PNG bytes; ``sections`` is a list of
    ``(heading, [(figure name or None, caption or HTML), ...])`` for :func:`domains.report.render_html`."""

    figures: dict
    sections: list


def present(analysis) -> Presentation:
    """Draw the figures and write the sections of the report of ``analysis``.

    Parameters
    ----------
    analysis : domains.pipeline.Analysis
        A finished analysis (its ``summary``, ``tables`` and ``views``).

    Returns
    -------
    Presentation
        Figures (PNG bytes by name) and the report's sections in reading order:
        overview, order and domains, bias comparison, spectroscopic grid, moiré.

    References
    ----------
    Common practice, no source: figures are drawn from block-reduced arrays
    (:func:`domains.report.downsample`) with physical axes and colour bars in units.

    Examples
    --------
    >>> from domains.pipeline import analyze
    >>> from domains.synth import cdw_scene
    >>> result = analyze(cdw_scene(shape=(160, 160), n_domains=2, rng=3).topography, progress=False)
    >>> shown = present(result)
    >>> shown.figures["domains"][:4] == b"\\x89PNG", [heading for heading, _ in shown.sections]
    (True, ['Overview', 'Order and domains'])
    """
    views, figures, sections = analysis.views or {}, {}, []
    for step in (_overview, _order, _bias, _grid, _moire):
        step(analysis.summary, analysis.tables, views, figures, sections)
    return Presentation(figures, sections)


def _overview(summary, tables, views, figures, sections):
    if "topography" not in views:
        return
    image, pixel, units = views["topography"]
    figures["topography"] = report.image_figure(image, pixel_size_nm=pixel, title="Topograph (levelled)", units=units)
    power, marked = views["spectrum"]
    figures["spectrum"] = report.spectrum_figure(*power, peaks=marked)
    items = [("topography", "The levelled topograph."),
             ("spectrum", "Log power spectrum (Hann window) with the indexed peaks: "
                          + ", ".join(sorted({r for *_, r in marked})) + ".")]
    if "drift" in views:
        magnitude, pixel = views["drift"]
        figures["drift"] = report.image_figure(magnitude, pixel_size_nm=pixel, cmap="viridis",
                                               title="Drift |u| (Lawler–Fujita)", units="nm")
        items.append(("drift", "Magnitude of the displacement field removed from every channel."))
    sections.append(("Overview", items))


def _domain_figure(view, **kwargs):
    """:func:`domains.report.domain_figure` of a view made by ``pipeline._domain_view``."""
    return report.domain_figure(view["image"], view["labels"], view["walls"], pixel_size_nm=view["pixel"],
                                colours=view["colours"], positions=view["positions"], **kwargs)


def _order(summary, tables, views, figures, sections):
    view = views.get("order")
    if view is None:
        return
    from .measure import DOMAIN_COLUMNS, WALL_COLUMNS

    names, kind, sigma_nm = view["names"], summary["order_kind"], summary["sigma_nm"]
    amp, pixel = view["amplitude"]
    figures["amplitude"] = report.image_figure(amp, pixel_size_nm=pixel, cmap="viridis",
                                               title=f"Order amplitude (mean of {len(names)}), sigma = {sigma_nm:.3g} nm",
                                               units=view["units"])
    phase, pixel = view["phase"]
    figures["phase"] = report.image_figure(phase, pixel_size_nm=pixel, cmap="twilight", limits=(-math.pi, math.pi),
                                           title=f"Phase of {names[0]}" + (" (drift-free, relative)"
                                                                           if kind == "commensurate" else ""),
                                           units="rad")
    domain_rows = tables["domains"][1]
    wall_rows = tables["walls"][1]
    figures["domains"] = _domain_figure(views["domains"], defects=summary["defects"]["list"],
                                        states={r["domain"]: r["state"] for r in domain_rows})
    figures["areas"] = report.histogram_figure([r["area_nm2"] for r in domain_rows], xlabel="domain area (nm²)",
                                               title=f"{len(domain_rows)} domains")
    sections.append(("Order and domains", [
        ("amplitude", "Lock-in amplitude 2|A| averaged over the order's components."),
        ("phase", "Phase of the first component (cyclic colour map)."),
        ("domains", "Domains (colours) over the topograph; walls in black; defects: + winding +1, x winding -1."),
        ("areas", "Histogram of domain areas (domains cut by the frame are lower bounds)."),
        (None, "<h3>Domains</h3>" + report.html_table(DOMAIN_COLUMNS, domain_rows)),
        (None, "<h3>Walls</h3>" + report.html_table(WALL_COLUMNS, wall_rows)),
    ]))


def _bias(summary, tables, views, figures, sections):
    view = views.get("bias")
    if view is None or summary.get("bias_comparison") is None:
        return
    pairs = summary["bias_comparison"]["pairs"]
    verdict_rows = []
    for pair in pairs:
        for d in pair["domains"]:
            verdict = d.get("verdict", {})
            verdict_rows.append({"bias_1_V": pair["bias_1_V"], "bias_2_V": pair["bias_2_V"], "domain": d["domain"],
                                 "delta_phi_deg": ";".join("–" if v is None else f"{v:.0f}"
                                                           for v in d.get("delta_phi_deg") or []),
                                 "verdict": verdict.get("verdict", ""), "confidence": verdict.get("confidence")})
    first, k = pairs[0], view["n_components"]

    def shown(value):
        # Shown in [-90, 270) so that inversions (180) and unchanged contrast (0) do not wrap.
        return None if value is None else (value + 90) % 360 - 90

    shifts = [(f"q{j + 1}", [d["domain"] + 0.08 * (j - (k - 1) / 2) for d in first["domains"]],
               [shown((d.get("delta_phi_deg") or [None] * k)[j]) for d in first["domains"]],
               [(d.get("delta_phi_deg_se") or [None] * k)[j] for d in first["domains"]]) for j in range(k)]
    figures["contrast"] = report.curves_figure(
        shifts, xlabel="domain", ylabel="Δφ (deg)", lines=False, reference=(0, 180),
        title=f"Phase shift of each order component, {first['bias_1_V']:+.2f} V vs {first['bias_2_V']:+.2f} V")
    items = _electronic_types(summary, views.get("electronic"), figures)
    if "conductance" not in figures:
        # No offset-free contrast (the types step said why): the plain means, in the sidecar's units.
        rows, token = tables["contrast"][1], view["unit_token"]
        curves = []
        for d in sorted({r["domain"] for r in rows}):
            mine = sorted((r for r in rows if r["domain"] == d), key=lambda r: r["bias_V"])
            curves.append((f"domain {d}", [r["bias_V"] for r in mine], [r[f"map_mean_{token}"] for r in mine],
                           [r[f"map_mean_{token}_se"] for r in mine]))
        figures["conductance"] = report.curves_figure(
            curves, xlabel="bias (V)", ylabel="mean map value", units=view["units"],
            title="Per-domain mean conductance at each bias")
        items = items + [("conductance", "Mean map value of each domain at each bias, with standard "
                                         "errors (pixels taken as independent).")]
    sections.append(("Bias comparison", items + [
        ("contrast", "Δφ_j = arg(A_j(V1) A_j(V2)*) of each order component in each domain, with standard errors: "
                     "±180° is an inverted contrast, 0° an unchanged one."),
        (None, "<h3>Contrast between biases</h3><p>Δφ_j = arg(A_j(V1) A_j(V2)*) per component; "
               "'inverted' needs every component compatible with π.</p>"
         + report.html_table(["bias_1_V", "bias_2_V", "domain", "delta_phi_deg", "verdict", "confidence"], verdict_rows)),
    ]))


def _electronic_types(summary, view, figures):
    """The electronic types' figures and report items (none when the contrast was not measured)."""
    if view is None:
        return []
    ec, types = view["contrast"], view["types"]
    ids = {d: f"{d}: {name}" for d, name in types.type_of().items()}
    figures["types"] = _domain_figure(view["map"], ids=ids, legend_title="electronic type",
                                      title=f"{types.n_types} electronic type{'s' if types.n_types > 1 else ''}",
                                      states={i + 1: f"type {n}" for i, n in enumerate(types.names)})
    # Each domain and each type in its type's colour of the type map (the viewer colours types alike).
    type_colours = view["map"]["colours"]
    figures["conductance"] = report.conductance_figure(ec, types=types, colours={
        d: type_colours.get(i + 1) for i, members in enumerate(types.types) for d in members})
    limits = " ".join(summary["electronic_types"].get("limitations", []))
    items = [(None, "<h3>Electronic types</h3><p>" + " ".join(types.sentences()) + "</p>"
              + (f"<p><b>Limits.</b> {limits}</p>" if limits else "")),
             ("conductance", report.conductance_caption(ec, types)),
             ("types", "Domains coloured by electronic type, each written with its id and type (walls in black).")]
    if types.n_types > 1:
        # With one type its contrast to the frame is zero by construction: no figure to show.
        biases = [b for q_, b in types.features if q_ == "conductance"]
        cols = [f for f, (q_, _) in enumerate(types.features) if q_ == "conductance"]
        curves = [(f"type {name}", biases, [float(types.value[i, f]) for f in cols],
                   [float(types.se[i, f]) for f in cols]) for i, name in enumerate(types.names)]
        figures["type_contrast"] = report.curves_figure(
            curves, xlabel="bias (V)", ylabel="contrast to the frame", units=ec.units,
            colours=[type_colours.get(i + 1) for i in range(types.n_types)],
            title="Conductance contrast of each electronic type")
        items.append(("type_contrast", "Contrast of each type to the frame at each bias, with standard errors."))
    return items


def _grid(summary, tables, views, figures, sections):
    view = views.get("grid")
    if view is None:
        return
    fp = view["fingerprints"]
    curves = [(f"domain {int(d)}", fp.energies_V, fp.amplitude_total[i], None) for i, d in enumerate(fp.domains)]
    figures["fingerprint"] = report.curves_figure(curves, xlabel="bias (V)", ylabel="order amplitude",
                                                  title="Per-domain order amplitude across the grid")
    items = [("fingerprint", "Order amplitude versus energy in each domain.")]
    types = view.get("types")
    if types is not None:
        spectra = types.spectra()
        mean, se = spectra["conductance"]
        energies = spectra["biases_V"]
        figures["type_spectra"] = report.curves_figure(
            [(f"type {n}", energies, mean[i], se[i]) for i, n in enumerate(types.names)], xlabel="bias (V)",
            ylabel="mean conductance", units=view["units"], title="Mean spectrum of each electronic type (grid)")
        limits = " ".join(summary["grid"]["electronic_types"]["limitations"])
        items = [(None, "<h3>Electronic types in the grid</h3><p>" + " ".join(types.sentences()) + "</p>"
                  "<p><b>Limits.</b> " + limits + "</p>"),
                 ("type_spectra", "Mean spectrum of each type (area-weighted mean of its domains' interiors), with "
                                  "standard errors; type_differences.csv says at which energies the types differ "
                                  "(tests on contrasts free of scan-line offsets).")] + items
    sections.append(("Spectroscopic grid", items))


def _moire(summary, tables, views, figures, sections):
    view = views.get("moire")
    if view is None:
        return
    from .measure import WALL_COLUMNS

    twist, pixel = view["twist_deg"]
    figures["twist"] = report.image_figure(twist, pixel_size_nm=pixel, cmap="viridis", units="deg",
                                           title="Local twist angle θ(r)")
    strain, pixel = view["heterostrain_percent"]
    figures["heterostrain"] = report.image_figure(strain, pixel_size_nm=pixel, cmap="magma", units="%",
                                                  title="Uniaxial heterostrain")
    figures["twist_domains"] = _domain_figure(view["domains"], title="Twist-angle domains over the image")
    moire, sigma = summary["moire"], view["sigma_nm"]
    columns, rows = tables["twist_domains"]
    sections.append(("Moiré", [
        ("twist", f"Local twist from the moiré wavevectors (mode: {view['mode']}); σ = {sigma:.3g} nm; "
                  f"trusted {2.5 * sigma:.3g} nm (2.5 σ) from the frame edge. " + moire["field_note"]),
        ("heterostrain", "Magnitude of the uniaxial heterostrain (polar decomposition of the layer transform)."),
        ("twist_domains", f"Regions of one twist range (tolerance {moire['twist_tolerance_deg']:.3g}°, "
                          f"{moire['twist_tolerance_from']}), grown over the whole frame; black lines are the walls "
                          "between them."),
        (None, "<h3>Twist domains</h3>" + report.html_table(columns if rows else [], rows)),
        (None, "<h3>Walls between twist domains</h3>" + report.html_table(WALL_COLUMNS, tables["walls"][1])),
    ]))
