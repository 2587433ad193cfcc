"""The calibration report: one self-contained HTML page for content reviewers and program evaluators.

Everything is inline (styles and SVG plots): the page opens from a file or a service answer with no
network, reads on a laptop screen and prints section by section. Every value comes from the bundle
document; every text is escaped.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence

import numpy as np

from calibration.bundle.schema import Bundle, ItemEntry
from calibration.bundle.scorer import BundleScorer
from calibration.bundle.store import AliasRecord
from calibration.irt.models import ItemParameters, total_information
from calibration.report.evidence import CellEvidence, cells_for_review, irt_text, logistic_text, observed_text
from calibration.report.plots import THETA, information_svg, item_curves_svg

CAUTIONS = (
    "Every score has measurement error: report the SE with every score.",
    "Scores from few answered items, or from a test whose reliability is low (below .90 for individual "
    "decisions), must not drive an individual high-stakes decision on their own.",
    "A DIF flag is statistical evidence, not a verdict: content experts review an item before it is left out "
    "or treated differently for a group. Leaving an item out for a group changes what that group's score covers.",
    "Scores of different versions are comparable only when the versions were linked; review items flagged for "
    "drift before comparing cycles.",
    "Follow the professional testing standards and the local rules that govern the assessment.",
)
STATUS_WORDS = {"invariant": "shared", "group_specific": "own parameters", "excluded": "left out"}

STYLE = """
:root { --ink: #1e293b; --muted: #64748b; --line: #d8dee6; --teal: #1f6f78; --clay: #c0622d; --sand: #f5efe6; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: var(--ink); margin: 0 auto;
       max-width: 1120px; padding: 1.5rem 1.25rem 4rem; line-height: 1.45; font-size: 15px; }
h1 { font-size: 1.6rem; margin: 0 0 .25rem; } h2 { font-size: 1.25rem; margin: 2.2rem 0 .6rem;
     border-bottom: 2px solid var(--teal); padding-bottom: .2rem; } h3 { font-size: 1.02rem; margin: 1.2rem 0 .4rem; }
p.lead { color: var(--muted); margin: 0 0 1rem; }
nav ol { columns: 2; font-size: .92rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .88rem; }
th, td { border-bottom: 1px solid var(--line); padding: .25rem .55rem; text-align: left; vertical-align: top; }
th { background: #eef3f5; font-weight: 600; } table.pairs th { background: none; width: 11rem; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.caution { background: var(--sand); border-left: 4px solid var(--clay); padding: .6rem .9rem; margin: 1rem 0; }
.caution ul { margin: .2rem 0 0 1.1rem; padding: 0; }
.matrix td.cell { text-align: center; font-size: .82rem; min-width: 6.5rem; }
.status-invariant { background: #eaf4f1; } .status-group_specific { background: #fdf0dc; }
.status-excluded { background: #f9dede; } .reviewed { outline: 2px dashed var(--clay); outline-offset: -3px; }
.item-cell { display: grid; grid-template-columns: minmax(300px, 460px) 1fr; gap: 1rem; align-items: start;
             border: 1px solid var(--line); border-radius: 6px; padding: .6rem; margin: .8rem 0; break-inside: avoid; }
.item-cell svg, .plot svg { width: 100%; height: auto; }
.muted { color: var(--muted); } .flag { color: var(--clay); font-weight: 600; }
details summary { cursor: pointer; color: var(--teal); }
@media (max-width: 760px) { .item-cell { grid-template-columns: 1fr; } nav ol { columns: 1; } }
@media print { body { max-width: none; font-size: 11pt; } section { break-before: page; } nav { display: none; }
               details { display: block; } details > summary { display: none; } .item-cell { break-inside: avoid; } }
"""


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _n(value: float | None, spec: str = ".3f") -> str:
    return "-" if value is None or (isinstance(value, float) and not np.isfinite(value)) else format(value, spec)


def _pairs(rows: Iterable[tuple[str, object]]) -> str:
    """A two-column table of names and values (no header row)."""
    body = "".join(f"<tr><th>{_e(name)}</th><td>{_e(value)}</td></tr>" for name, value in rows)
    return f'<table class="pairs"><tbody>{body}</tbody></table>'


def _table(
    header: Sequence[str], rows: Iterable[Sequence[object]], *, numeric: Sequence[int] = (), css: str = ""
) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join(
        "<tr>" + "".join(f"<td{' class=num' if i in numeric else ''}>{_e(v)}</td>" for i, v in enumerate(row)) + "</tr>"
        for row in rows
    )
    return f'<table class="{css}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _one(slope: float, intercepts: Sequence[float], model: str, guessing: float | None) -> ItemParameters:
    return ItemParameters.stack([(slope, list(intercepts), model, guessing)])


def _overview(bundle: Bundle) -> str:
    provenance, groups = bundle.provenance, bundle.metric.groups
    models: dict[str, int] = {}
    for item in bundle.items:
        models[item.model] = models.get(item.model, 0) + 1
    rows = [
        ("bundle", f"{bundle.label} (sha256 {bundle.hash[:16]}...)"),
        ("calibrated", f"{bundle.created_at} with equitheta {bundle.software_version}"),
        ("data", f"{provenance.data_source}: {provenance.n_respondents} respondents"),
        ("items", f"{len(bundle.items)} calibrated (" + ", ".join(f"{n} {m}" for m, n in sorted(models.items())) + ")"),
        ("reference group", bundle.metric.reference_group),
        ("estimation", bundle.fit.estimation),
        (
            "fit",
            f"log-likelihood {bundle.fit.log_likelihood:,.2f}, AIC {bundle.fit.aic:,.1f}, BIC {bundle.fit.bic:,.1f}, "
            + ("converged" if bundle.fit.converged else "NOT converged")
            + f" after {bundle.fit.n_iter} EM iterations",
        ),
    ]
    if bundle.link is not None:
        rows.append(("scale", f"linked to {bundle.link.parent} ({bundle.link.method}); see the link section"))
    parts = [_pairs(rows)]
    parts.append("<h3>Groups</h3>")
    parts.append(
        _table(
            ("group", "respondents", "latent mean (SE)", "latent SD (SE)", "items left out"),
            [
                (
                    g.name + (" (reference)" if g.name == bundle.metric.reference_group else ""),
                    g.n_respondents,
                    f"{g.latent_mean:.3f} ({_n(g.latent_mean_se)})",
                    f"{g.latent_sd:.3f} ({_n(g.latent_sd_se)})",
                    sum(1 for item in bundle.items if item.policy[g.name].status == "excluded"),
                )
                for g in groups
            ],
            numeric=(1, 4),
        )
    )
    if bundle.excluded_items:
        parts.append("<h3>Items left out of the calibration</h3>")
        parts.append(_table(("item", "reason"), [(e.id, e.reason) for e in bundle.excluded_items]))
    if provenance.notes:
        parts.append("<h3>Handling notes</h3><ul>" + "".join(f"<li>{_e(n)}</li>" for n in provenance.notes) + "</ul>")
    return "".join(parts)


def _items(bundle: Bundle) -> str:
    """Every item's model and reference parameters with their SEs."""
    asymptotes = any(item.guessing is not None for item in bundle.items)

    def with_se(value: float | None, se: float | None, spec: str) -> str:
        return _n(value, spec) + ("" if se is None else f" ({se:{spec}})")

    rows = []
    for item in bundle.items:
        locations = "  ".join(with_se(b, s, ".2f") for b, s in zip(item.thresholds, item.threshold_se, strict=True))
        row: list[object] = [item.id, item.model, with_se(item.slope, item.slope_se, ".3f"), locations]
        if asymptotes:
            held = item.guessing is not None and item.guessing_se is None
            row.append(
                "-" if item.guessing is None else with_se(item.guessing, item.guessing_se, ".3f") + held * " held"
            )
        row += [item.n_responses, _n(item.item_rest_correlation, ".2f")]
        rows.append(row)
    header = ["item", "model", "slope (SE)", "thresholds or steps (SE)", *(["asymptote (SE)"] if asymptotes else [])]
    note = (
        "<p class=muted>Slope-threshold form of the reference group's parameters. Graded and 2PL items: the "
        "theta where each boundary curve passes 0.5; partial-credit items: the step difficulties, where adjacent "
        "categories are equally likely (they need not be ordered); 3PL items: the location of the curve above "
        "its lower asymptote, which is estimated under a beta(5, 17) prior unless the item spec holds it.</p>"
    )
    n = len(header)
    return _table([*header, "answers", "item-rest r"], rows, numeric=(n, n + 1)) + note


def _ladder(bundle: Bundle) -> str:
    if not bundle.invariance:
        return "<p class=muted>A single-group calibration has no invariance ladder.</p>"
    return _table(
        ("model", "what it holds equal", "log-likelihood", "parameters", "AIC", "BIC", "compared with", "LR (df)", "p"),
        [
            (
                r.model,
                r.description,
                f"{r.log_likelihood:,.2f}",
                r.n_parameters,
                f"{r.aic:,.1f}",
                f"{r.bic:,.1f}",
                r.compared_with or "-",
                "-" if r.lr_statistic is None else f"{r.lr_statistic:.1f} ({r.df})",
                _n(r.p_value, ".3g"),
            )
            for r in bundle.invariance
        ],
        numeric=(2, 3, 4, 5, 7, 8),
    )


def _anchors(bundle: Bundle) -> str:
    anchors = bundle.anchors
    text = f"<p><b>Anchors:</b> {_e(', '.join(anchors.items) or 'none')}. {_e(anchors.method)}</p>"
    if anchors.ranking:
        text += _table(
            ("rank", "item", "screening statistic", "worst group", "smallest adjusted p", "anchor"),
            [
                (
                    c.rank,
                    c.item,
                    _n(c.statistic, ".2f"),
                    c.worst_group,
                    _n(c.p_adjusted, ".3g"),
                    "yes" if c.selected else "",
                )
                for c in anchors.ranking
            ],
            numeric=(0, 2, 4),
        )
    return text


def _matrix(bundle: Bundle, cells: dict[tuple[str, str], CellEvidence]) -> str:
    groups = [g.name for g in bundle.metric.groups]
    head = "<tr><th>item</th>" + "".join(f"<th>{_e(g)}</th>" for g in groups) + "</tr>"
    rows = []
    for item in bundle.items:
        tds = []
        for g in groups:
            policy = item.policy[g]
            cell = cells.get((item.id, g))
            reviewed = cell is not None and cell.reviewed
            css = f"cell status-{policy.status}" + (" reviewed" if reviewed else "")
            word = STATUS_WORDS[policy.status] + (" (reviewer)" if reviewed else "")
            flag = " *" if cell is not None and cell.verdict != "agree: no DIF" else ""
            tds.append(f'<td class="{css}" title="{_e(policy.reason)}">{_e(word + flag)}</td>')
        rows.append(f"<tr><th>{_e(item.id)}</th>{''.join(tds)}</tr>")
    legend = (
        "<p class=muted>shared: the reference parameters; own parameters: the group's own; left out: not in the "
        "group's score. * a method flags the cell; (reviewer) and a dashed frame: a reviewer's decision.</p>"
    )
    return f'<table class="matrix"><thead>{head}</thead><tbody>{"".join(rows)}</tbody></table>{legend}'


def _cell_plot(bundle: Bundle, entry: ItemEntry, cell: CellEvidence) -> str:
    reference = _one(entry.slope, entry.intercepts, entry.model, entry.guessing)
    policy = cell.policy
    if policy.status == "group_specific" and policy.slope is not None and policy.intercepts:
        own = _one(policy.slope, policy.intercepts, entry.model, policy.guessing)
        source = "the group's parameters in this bundle"
    elif cell.irt is not None and cell.irt.focal_slope is not None and cell.irt.focal_intercepts:
        own = _one(cell.irt.focal_slope, cell.irt.focal_intercepts, entry.model, cell.irt.focal_guessing)
        source = "the group's own parameters in the DIF test's freed model"
    else:
        own, source = None, "no group-specific curve is recorded for this cell"
    group = next(g for g in bundle.metric.groups if g.name == cell.group)
    svg = item_curves_svg(
        reference,
        own,
        group_name=cell.group,
        mean=group.latent_mean,
        sd=group.latent_sd,
        title=f"{entry.id} in {cell.group}",
    )
    g2, p, effect = irt_text(cell.irt)
    rows = [
        (
            "policy",
            STATUS_WORDS[policy.status]
            + (f" (proposed: {STATUS_WORDS[policy.proposed_status]})" if policy.proposed_status else ""),
        ),
        ("reason", policy.reason),
        ("IRT anchored LR, G2 (df)", g2),
        ("FDR-adjusted p", p),
        ("effect, theta units [95%]", effect),
        ("observed score", observed_text(cell.observed)),
        ("logistic delta R2", logistic_text(cell.observed)),
        ("methods", cell.verdict),
        ("group curve", source),
    ]
    if cell.reviewed:
        rows.insert(2, ("reviewer's note", cell.reviewer_note or ""))
    return (
        f'<div class="item-cell" data-item="{_e(entry.id)}" data-group="{_e(cell.group)}">'
        f'<figure class="plot" aria-label="expected score of {_e(entry.id)} by theta">{svg}</figure>'
        f"<div>{_pairs(rows)}</div></div>"
    )


def _flagged(bundle: Bundle, cells: list[CellEvidence]) -> str:
    if not cells:
        return "<p>No item was flagged in any group by any method, and every cell is shared.</p>"
    entries = {item.id: item for item in bundle.items}
    intro = (
        "<p>Every cell that is not shared or that any method flags, with the reference curve (solid), the "
        "group's own curve when known (dashed) and the group's latent density (shaded). The effect is the gap "
        "between the curves in theta units, weighted by the group's density.</p>"
    )
    return intro + "".join(_cell_plot(bundle, entries[c.item], c) for c in cells)


def _information(bundle: Bundle) -> str:
    scorer = BundleScorer(bundle)
    curves = {g: (THETA, total_information(plan.params, THETA)) for g, plan in scorer.plans.items()}
    points = (-2.0, -1.0, 0.0, 1.0, 2.0)
    at = np.searchsorted(THETA, points)
    table = _table(
        ("group", *(f"SE at {t:g}" for t in points)),
        [(g, *(f"{1 / np.sqrt(info[i]):.3f}" for i in at)) for g, (_, info) in curves.items()],
        numeric=tuple(range(1, len(points) + 1)),
    )
    return f'<figure class="plot">{information_svg(curves)}</figure>{table}'


def _quality(bundle: Bundle) -> str:
    by_group = bundle.quality.by_group
    reliability = _table(
        (
            "group",
            "respondents",
            "alpha",
            "alpha 95% interval",
            "omega",
            "marginal reliability",
            "eigenvalue ratio",
            "residual PCA eigenvalue",
        ),
        [
            (
                g,
                q.n_respondents,
                _n(q.alpha),
                "-" if q.alpha_interval is None else f"{q.alpha_interval[0]:.3f} to {q.alpha_interval[1]:.3f}",
                _n(q.omega),
                _n(q.marginal_reliability),
                _n(q.dimensionality.eigenvalue_ratio if q.dimensionality else None, ".2f"),
                _n(q.dimensionality.residual_pca_first_eigenvalue if q.dimensionality else None, ".2f"),
            )
            for g, q in by_group.items()
        ],
        numeric=(1, 2, 4, 5, 6, 7),
    )
    comparisons = "".join(
        f"<li>{_e(r.group)} against {_e(r.reference)}: W = {r.w:.3f} on ({r.df[0]}, {r.df[1]}) df, p = "
        f"{r.p_value:.3g}, Holm-adjusted {r.p_holm:.3g}</li>"
        for r in bundle.quality.alpha_comparison
    )
    if comparisons:
        reliability += (
            f"<p>Equal alpha (Feldt's test; each group's alpha on the items it is scored on):</p><ul>{comparisons}</ul>"
        )
    groups = list(by_group)
    fit_rows = []
    for item in bundle.items:
        row: list[object] = [item.id]
        for g in groups:
            stats = by_group[g].items.get(item.id)
            row.append("-" if stats is None else f"{_n(stats.s_x2_p, '.3g')} / {_n(stats.rmsd)}")
        fit_rows.append(row)
    fit = _table(("item", *(f"{g}: S-X2 p / RMSD" for g in groups)), fit_rows)
    warnings = "".join(f"<li>{_e(w)}</li>" for w in bundle.quality.warnings)
    return (
        "<h3>Reliability and dimensionality by group</h3>"
        + reliability
        + "<p class=muted>Alpha's interval is Feldt's F-based interval; omega comes from a one-factor "
        "maximum-likelihood model of the item correlations. "
        "Rules of thumb: alpha .70 for group use, .90 for individual decisions; an eigenvalue "
        "ratio well above 3 and a residual PCA eigenvalue under about 2 support one dimension (common practice; "
        "no single rule is decisive).</p><h3>Item fit by group</h3>"
        + fit
        + (f"<h3>Warnings of the calibration</h3><ul>{warnings}</ul>" if warnings else "")
    )


def _categories(bundle: Bundle) -> str:
    """Category functioning of every polytomous item in every group, flagged categories first in words."""
    parts = []
    for g, q in bundle.quality.by_group.items():
        if not q.categories:
            continue
        rows = []
        for item, check in q.categories.items():
            for c, (n, mean, modal) in enumerate(zip(check.counts, check.mean_theta, check.modal, strict=True)):
                where = "never" if modal is None else f"{_n(modal.low, '.2f')} to {_n(modal.high, '.2f')}"
                ordered = ("yes" if check.steps_ordered else "no") if c == 0 else ""
                rows.append((item if c == 0 else "", c, n, _n(mean, ".2f"), where, ordered))
        flags = "".join(f"<li>{_e(item)}: {_e(f)}</li>" for item, check in q.categories.items() for f in check.flags)
        parts.append(
            f"<h3>{_e(g)}</h3>"
            + _table(
                ("item", "category", "answers", "mean theta", "most probable (theta)", "steps in order"),
                rows,
                numeric=(1, 2, 3),
            )  # fmt: skip
            + (f"<ul>{flags}</ul>" if flags else "<p class=muted>Every category works as intended.</p>")
        )
    if not parts:
        return "<p class=muted>No item has more than two categories.</p>"
    return (
        "<p class=muted>Each category should be the most probable answer somewhere on the scale, and its "
        "respondents' mean theta should rise with the category (common-practice checks; '-' ends run off the "
        "grid at -6 or 6). A flagged category is a question for the authors of the rating guide, not an "
        "automatic merge.</p>" + "".join(parts)
    )


def _summed_scores(bundle: Bundle) -> str:
    parts = []
    for g, q in bundle.quality.by_group.items():
        table = _table(
            ("summed score", "theta (EAP)", "SE", "probability"),
            [(r.summed_score, f"{r.theta:.3f}", f"{r.se:.3f}", f"{r.probability:.4f}") for r in q.summed_score_table],
            numeric=(0, 1, 2, 3),
        )
        parts.append(f"<details><summary>{_e(g)}: {len(q.summed_score_table)} summed scores</summary>{table}</details>")
    return (
        "<p>For respondents who answer every item of their group's set: each summed score's EAP theta and "
        "posterior SD.</p>" + "".join(parts)
    )


def _link(bundle: Bundle) -> str:
    link = bundle.link
    if link is None:
        return ""
    c = link.constants
    rows = [
        (
            r.item,
            "-" if r.wald is None else f"{r.wald:.1f} ({r.df})",
            _n(r.p_adjusted, ".3g"),
            f"{r.g2:.1f}",
            f"{_n(r.effect_theta, '.2f')} ({r.level})",
            "drifted: out of the link" if r.drifted else "in the link",
        )
        for r in link.drift
    ]
    return (
        f"<p>{_e(link.method)} link, {link.rounds} purification round(s): theta({_e(link.parent)}) = "
        f"{c.slope:.3f} (SE {_n(c.slope_se)}) x theta(this cycle) {'-' if c.intercept < 0 else '+'} "
        f"{abs(c.intercept):.3f} (SE {_n(c.intercept_se)}). Link items: {_e(', '.join(link.link_items))}. New items: "
        f"{_e(', '.join(link.new_items) or 'none')}.</p>"
        + _table(("item", "Wald (df)", "FDR p", "LR G2", "effect", "link"), rows, numeric=(1, 2, 3))
        + f"<p class=muted>{_e(link.rule)}</p><div class=caution>{_e(link.caution)}</div>"
    )


def _aliases(aliases: dict[str, AliasRecord] | None, name: str) -> str:
    if not aliases:
        return ""
    rows = [
        (alias, m.version, m.moved_at, m.by)
        for alias, record in sorted(aliases.items())
        for m in reversed(record.history)
    ]
    return _table(("alias", "version", "moved at (UTC)", "by"), rows)


def render_report(bundle: Bundle, *, aliases: dict[str, AliasRecord] | None = None) -> str:
    """The whole report page for ``bundle`` (``aliases``: the name's alias history, when the caller has it)."""
    cells = cells_for_review(bundle)
    by_cell = {(c.item, c.group): c for c in cells}
    reviewed = [c for c in cells if c.reviewed]
    sections = [
        ("overview", "Data and calibration", _overview(bundle)),
        ("items", "Items and their parameters", _items(bundle)),
        ("ladder", "Invariance ladder", _ladder(bundle)),
        ("anchors", "Anchors and how they were chosen", _anchors(bundle)),
        ("policy", "Item policy by group", _matrix(bundle, by_cell)),
        ("flagged", "Flagged and non-shared cells, with all the evidence", _flagged(bundle, cells)),
        ("information", "Test information and SE by group", _information(bundle)),
        ("quality", "Reliability, dimensionality and item fit", _quality(bundle)),
        ("categories", "Category functioning", _categories(bundle)),
        ("summed", "Summed-score conversion tables", _summed_scores(bundle)),
    ]
    if reviewed:
        rows = [
            (
                c.item,
                c.group,
                STATUS_WORDS.get(c.policy.proposed_status or "", "-"),
                STATUS_WORDS[c.policy.status],
                c.reviewer_note or "",
            )
            for c in reviewed
        ]
        sections.insert(
            4, ("reviewed", "Reviewers' decisions", _table(("item", "group", "proposed", "decided", "note"), rows))
        )
    if bundle.link is not None:
        sections.append(("link", f"Link to {bundle.link.parent}", _link(bundle)))
    if aliases:
        sections.append(("aliases", f"Aliases of {bundle.name}", _aliases(aliases, bundle.name)))
    nav = "".join(f'<li><a href="#{key}">{_e(title)}</a></li>' for key, title, _ in sections)
    body = "".join(f'<section id="{key}"><h2>{_e(title)}</h2>{content}</section>' for key, title, content in sections)
    cautions = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    return (
        "<!DOCTYPE html><html lang=en><head><meta charset=utf-8>"
        '<meta name=viewport content="width=device-width, initial-scale=1">'
        f"<title>{_e(bundle.label)}: calibration report</title><style>{STYLE}</style></head><body>"
        f"<h1>{_e(bundle.label)}: calibration report</h1>"
        f"<p class=lead>{_e(len(bundle.items))} items, {_e(bundle.provenance.n_respondents)} respondents, "
        f"{_e(len(bundle.metric.groups))} group(s); written from the published bundle "
        f"(sha256 {_e(bundle.hash[:16])}...).</p>"
        f"<div class=caution><b>Read with care.</b><ul>{cautions}</ul></div>"
        f"<nav><ol>{nav}</ol></nav>{body}"
        f'<p class=muted style="margin-top:3rem">equitheta {_e(bundle.software_version)}; bundle {_e(bundle.label)}, '
        f"sha256 {_e(bundle.hash)}.</p></body></html>"
    )
