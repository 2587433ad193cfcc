"""Summaries of a bundle for people: what `calibrate` prints and what `bundle show` adds.

Every value goes through :func:`dash`, so a statistic that does not exist (the LR test
of a rung with no freed cell, an alpha without complete rows) prints as a dash.
"""

from __future__ import annotations

from calibration.bundle.compare import BundleDiff
from calibration.bundle.schema import Bundle, CategoryFunctioning, ModalRange
from calibration.bundle.store import AliasRecord
from calibration.cli.console import dash, new_table, out_console
from calibration.dif.effect_size import effect_interval
from calibration.report.evidence import cells_for_review, irt_text, logistic_text, observed_text

CAUTION = (
    "Every score carries measurement error: report the SE with it. Scores with low reliability or few "
    "answered items must not drive individual high-stakes decisions; follow the professional testing "
    "standards and local rules that govern the assessment."
)
DIF_CAUTION = (
    "DIF flags are statistical evidence, not verdicts: content experts review every flagged item before it is "
    "left out or treated differently for a group. Leaving an item out for one group changes that group's "
    "content coverage."
)
# Theta points at which `bundle show` prints the test information.
INFORMATION_THETAS = (-3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0)


def print_calibration_summary(bundle: Bundle) -> None:
    """Headline, item parameters, groups, anchors, policy with evidence, ladder, warnings."""
    console = out_console()
    reference = bundle.metric.reference_group
    group = bundle.quality.by_group[reference]
    grouped = len(bundle.metric.groups) > 1
    fit = bundle.fit
    console.print(
        f"{bundle.name}: {len(bundle.items)} items, {bundle.provenance.n_respondents} respondents "
        f"({bundle.provenance.data_source})",
        highlight=False,
    )
    which = "final model under the item policy" if grouped else "model"
    console.print(
        f"  {which}: log-likelihood {fit.log_likelihood:,.3f}  AIC {fit.aic:,.1f}  BIC {fit.bic:,.1f}  "
        f"{'converged' if fit.converged else 'NOT converged'} after {fit.n_iter} EM iterations",
        highlight=False,
    )
    if grouped:
        console.print(
            "  (excluded cells count as not administered in the final model, so its log-likelihood is "
            "not comparable with the invariance ladder's below)",
            highlight=False,
        )
    where = f"reference group {reference}" if grouped else "all respondents"
    console.print(
        f"  {where}: alpha {dash(group.alpha)}  marginal reliability {dash(group.marginal_reliability)}"
        + ("  (every group: see the groups table)" if grouped else ""),
        highlight=False,
    )
    asymptotes = any(item.guessing is not None for item in bundle.items)
    table = new_table(
        "item parameters (slope-threshold form; a partial-credit item's thresholds are its steps; SE in brackets)",
        ["item", "model", "slope", "thresholds", *(["asymptote"] if asymptotes else []), "item-rest r"],
        right=("slope", "asymptote", "item-rest r"),
    )
    for item in bundle.items:
        thresholds = "  ".join(
            dash(b, ".2f") + ("" if s is None else f" ({s:.2f})")
            for b, s in zip(item.thresholds, item.threshold_se, strict=True)
        )
        slope = dash(item.slope) + ("" if item.slope_se is None else f" ({item.slope_se:.3f})")
        asymptote = []
        if asymptotes:  # an asymptote without an SE was held at the item spec's value
            se = " (held)" if item.guessing_se is None else f" ({item.guessing_se:.3f})"
            asymptote = ["-" if item.guessing is None else f"{item.guessing:.3f}{se}"]
        table.add_row(item.id, item.model, slope, thresholds, *asymptote, dash(item.item_rest_correlation, ".2f"))
    console.print(table)
    for item in bundle.excluded_items:
        console.print(f"  left out {item.id}: {item.reason}", highlight=False)
    if bundle.link is not None:
        print_link(bundle)
    if grouped:
        _print_groups(bundle)
        print_policy_evidence(bundle)
        _print_ladder(bundle)
    for warning in bundle.quality.warnings:
        console.print(f"  warning: {warning}", highlight=False)


def print_link(bundle: Bundle) -> None:
    """The link to the parent: method, constants, link items, and every common item's drift test."""
    link = bundle.link
    if link is None:
        return
    console = out_console()
    constants = link.constants
    grouped = len(bundle.metric.groups) > 1
    who = f"reference group {bundle.metric.reference_group}" if grouped else "respondents"
    slope_se = "" if constants.slope_se is None else f" (SE {constants.slope_se:.3f})"
    intercept_se = "" if constants.intercept_se is None else f" (SE {constants.intercept_se:.3f})"
    console.print(
        f"  on the scale of {link.parent} ({link.method} link, {link.rounds} purification round(s)): "
        f"theta({link.parent}) = {constants.slope:.3f}{slope_se} x theta(this cycle's {who}) "
        f"{'-' if constants.intercept < 0 else '+'} {abs(constants.intercept):.3f}{intercept_se}",
        highlight=False,
    )
    console.print(
        f"  link items ({len(link.link_items)}): {', '.join(link.link_items)}; new items ({len(link.new_items)}): "
        f"{', '.join(link.new_items) or 'none'}; kept out for drift: {', '.join(link.drifted_items) or 'none'}",
        highlight=False,
    )
    for item in link.not_linked:
        console.print(f"  not linked {item.item}: {item.reason}", highlight=False)
    table = new_table(
        f"drift of the common items against {link.parent} (Wald test with both cycles' errors, FDR across the "
        "common items; LR G2 with the published values as exact; effect in theta units)",
        ["item", "Wald (df)", "p adj.", "G2", "effect (95% CI)", "level", "published b", "this cycle b", "link"],
        right=("Wald (df)", "p adj.", "G2"),
    )
    for row in link.drift:
        low, high = effect_interval(row.effect_theta or 0.0, row.effect_theta_se or float("nan"))
        effect = dash(row.effect_theta, ".2f") + ("" if row.effect_theta_se is None else f" ({low:.2f}-{high:.2f})")
        published = "  ".join(f"{-c / row.parent_slope:.2f}" for c in row.parent_intercepts)
        own = "  ".join(f"{-c / row.slope:.2f}" for c in row.intercepts)
        table.add_row(
            row.item,
            f"{dash(row.wald, '.1f')} ({row.df})",
            dash(row.p_adjusted, ".3g"),
            f"{row.g2:.1f}",
            effect,
            row.level,
            published,
            own,
            "DRIFTED: out" if row.drifted else "in",
        )
    console.print(table)
    console.print(f"  {link.caution}", highlight=False)


def _print_groups(bundle: Bundle) -> None:
    console = out_console()
    groups = new_table(
        f"groups (reference: {bundle.metric.reference_group})",
        ["group", "n", "latent mean (SE)", "latent SD (SE)", "alpha", "marginal reliability", "items left out"],
        right=("n", "alpha", "marginal reliability", "items left out"),
    )
    for g in bundle.metric.groups:
        q = bundle.quality.by_group[g.name]
        left_out = sum(1 for item in bundle.items if item.policy[g.name].status == "excluded")
        groups.add_row(
            g.name,
            str(g.n_respondents),
            dash(g.latent_mean) + ("" if g.latent_mean_se is None else f" ({g.latent_mean_se:.3f})"),
            dash(g.latent_sd) + ("" if g.latent_sd_se is None else f" ({g.latent_sd_se:.3f})"),
            dash(q.alpha),
            dash(q.marginal_reliability),
            str(left_out),
        )
    console.print(groups)
    anchors = bundle.anchors
    console.print(f"  anchors: {', '.join(anchors.items) or 'none'} ({anchors.method})", highlight=False)


def print_policy_evidence(bundle: Bundle) -> None:
    """Every cell that is not invariant or that any method flags, with all the evidence side by side."""
    console = out_console()
    if bundle.dif is None:
        return
    table = new_table(
        "item policy and DIF evidence (cells not invariant, or flagged by any method; proposals for review)",
        [
            "item",
            "group",
            "policy",
            "IRT G2 (df)",
            "FDR p",
            "effect, theta units [95%]",
            "observed score",
            "logistic dR2",
            "methods",
        ],
        right=("IRT G2 (df)", "FDR p"),
    )
    cells = cells_for_review(bundle)
    for cell in cells:
        g2, p, effect = irt_text(cell.irt)
        status = cell.policy.status + (" (reviewer)" if cell.reviewed else "")
        table.add_row(
            cell.item,
            cell.group,
            status,
            g2,
            p,
            effect,
            observed_text(cell.observed),
            logistic_text(cell.observed),
            cell.verdict,
        )
    if cells:
        console.print(table)
        for item in bundle.items:
            for group, policy in item.policy.items():
                if policy.status != "invariant":
                    console.print(f"  {item.id} in {group}: {policy.status}: {policy.reason}", highlight=False)
    else:
        console.print("  no item was flagged for DIF in any group by any method", highlight=False)
    console.print(f"  {DIF_CAUTION}", style="dim", highlight=False)


def _print_ladder(bundle: Bundle) -> None:
    if not bundle.invariance:
        return
    ladder = new_table(
        "invariance ladder (all rungs on the same data)",
        ["model", "log-likelihood", "parameters", "AIC", "BIC", "LR test"],
        right=("log-likelihood", "parameters", "AIC", "BIC"),
    )
    for row in bundle.invariance:
        if row.lr_statistic is None or row.compared_with is None:
            test = "-"
        elif not row.df:
            test = f"vs {row.compared_with}: same model (no cell freed)"
        else:
            test = f"vs {row.compared_with}: {row.lr_statistic:.1f} on {row.df} df, p = {dash(row.p_value, '.3g')}"
        ladder.add_row(
            row.model,
            dash(row.log_likelihood, ",.1f"),
            str(row.n_parameters),
            dash(row.aic, ",.1f"),
            dash(row.bic, ",.1f"),
            test,
        )
    out_console().print(ladder)


def print_bundle_details(bundle: Bundle) -> None:
    """What `bundle show` adds to the summary: item quality, dimensionality, test information."""
    console = out_console()
    for group, quality in bundle.quality.by_group.items():
        title = "item quality" + ("" if len(bundle.quality.by_group) == 1 else f" in group {group}")
        table = new_table(
            title,
            ["item", "item-rest r", "alpha if deleted", "S-X2 (df)", "S-X2 p", "RMSD"],
            right=("item-rest r", "alpha if deleted", "S-X2 (df)", "S-X2 p", "RMSD"),
        )
        for item, q in quality.items.items():
            s_x2 = "-" if q.s_x2 is None else f"{q.s_x2:.1f} ({dash(q.s_x2_df, 'd')})"
            table.add_row(
                item,
                dash(q.item_rest_correlation, ".2f"),
                dash(q.alpha_if_deleted),
                s_x2,
                dash(q.s_x2_p, ".3g"),
                dash(q.rmsd),
            )
        console.print(table)
        dims = quality.dimensionality
        if dims is not None:
            console.print(
                f"  dimensionality{'' if len(bundle.quality.by_group) == 1 else f' ({group})'}: first-to-second "
                f"eigenvalue ratio {dash(dims.eigenvalue_ratio, '.2f')}, largest eigenvalue of the residual PCA "
                f"{dash(dims.residual_pca_first_eigenvalue, '.2f')} ({dims.n_complete} complete rows)",
                highlight=False,
            )
        where = "" if len(bundle.quality.by_group) == 1 else f" ({group})"
        interval = "" if quality.alpha_interval is None else " [{:.3f}, {:.3f}]".format(*quality.alpha_interval)
        if quality.alpha is not None:
            console.print(
                f"  reliability{where}: alpha {quality.alpha:.3f}{interval} (95%, Feldt), omega "
                f"{dash(quality.omega)} (one-factor ML), marginal reliability {dash(quality.marginal_reliability)}",
                highlight=False,
            )
        if quality.categories:
            _print_categories(group if len(bundle.quality.by_group) > 1 else None, quality.categories)
    for row in bundle.quality.alpha_comparison:
        console.print(
            f"  equal alpha, {row.group} vs {row.reference}: W = {row.w:.3f} on ({row.df[0]}, {row.df[1]}) df, "
            f"p = {row.p_value:.3g} (Holm {row.p_holm:.3g}; Feldt's test; each group's alpha on the items it is "
            "scored on)",
            highlight=False,
        )
    info = bundle.quality.test_information
    table = new_table(
        f"test information, reference group {bundle.metric.reference_group}",
        ["theta", "information", "SE"],
        right=("theta", "information", "SE"),
    )
    for target in INFORMATION_THETAS:
        nearest = min(range(len(info.theta)), key=lambda i: abs(info.theta[i] - target))
        table.add_row(f"{info.theta[nearest]:.1f}", dash(info.information[nearest], ".2f"), dash(info.se[nearest]))
    console.print(table)
    console.print(f"  version {bundle.version}, created {bundle.created_at}, sha256 {bundle.hash}", highlight=False)
    console.print(f"  {CAUTION}", style="dim", highlight=False)


def _modal_text(modal: ModalRange | None) -> str:
    if modal is None:
        return "never"
    low = "" if modal.low is None else f"{modal.low:.2f}"
    high = "" if modal.high is None else f"{modal.high:.2f}"
    return f"below {high}" if not low else (f"above {low}" if not high else f"{low} to {high}")


def _print_categories(group: str | None, categories: dict[str, CategoryFunctioning]) -> None:
    """Category functioning: every polytomous item's categories (answers, mean theta, where most probable)."""
    console = out_console()
    table = new_table(
        "category functioning" + ("" if group is None else f" in group {group}")
        + " (answers, respondents' mean theta, theta range where the category is the most probable answer)",
        ["item", "category", "answers", "mean theta", "most probable", "steps in order"],
        right=("category", "answers", "mean theta"),
    )  # fmt: skip
    for item, check in categories.items():
        for c, (n, mean, modal) in enumerate(zip(check.counts, check.mean_theta, check.modal, strict=True)):
            ordered = ("yes" if check.steps_ordered else "NO") if c == 0 else ""
            table.add_row(item if c == 0 else "", str(c), str(n), dash(mean, ".2f"), _modal_text(modal), ordered)
    console.print(table)
    for item, check in categories.items():
        for flag in check.flags:
            console.print(f"  {item}: {flag}", highlight=False)


def _thresholds(values: list[float] | None) -> str:
    return "-" if values is None else "  ".join(f"{b:.2f}" for b in values)


def print_bundle_diff(diff: BundleDiff) -> None:
    """Items, policy, anchors, group densities and expected scores of two versions, side by side."""
    console = out_console()
    console.print(f"{diff.from_bundle} -> {diff.to_bundle}: {diff.scale_note}", highlight=False)
    moved = [i for i in diff.items if i.change != "unchanged"]
    unchanged = len(diff.items) - len(moved)
    table = new_table(
        f"items ({unchanged} unchanged not listed; change in theta units, newer reference population)",
        ["item", "change", "slope", "thresholds", "size (signed)"],
        right=("size (signed)",),
    )
    for item in moved:
        slope = f"{dash(item.from_slope, '.3f')} -> {dash(item.to_slope, '.3f')}"
        thresholds = f"{_thresholds(item.from_thresholds)} -> {_thresholds(item.to_thresholds)}"
        size = "-" if item.change_theta is None else f"{item.change_theta:.2f} ({item.change_signed:+.2f})"
        table.add_row(item.item, item.change, slope, thresholds, size)
    console.print(table)
    for change in diff.policy:
        console.print(
            f"  policy {change.item} in {change.group}: {change.from_status} -> {change.to_status} "
            f"({change.to_reason})",
            highlight=False,
        )
    if diff.anchors_added or diff.anchors_removed:
        console.print(
            f"  anchors added: {', '.join(diff.anchors_added) or 'none'}; removed: "
            f"{', '.join(diff.anchors_removed) or 'none'}",
            highlight=False,
        )
    groups = new_table("groups (latent mean and SD)", ["group", "older", "newer"])
    for g in diff.groups:
        older = "-" if g.from_mean is None else f"{g.from_mean:.3f} / {g.from_sd:.3f}"
        newer = "-" if g.to_mean is None else f"{g.to_mean:.3f} / {g.to_sd:.3f}"
        groups.add_row(g.group, older, newer)
    console.print(groups)
    if diff.scores:
        scores = new_table(
            f"a respondent who answers the {len(diff.common_items)} common items: expected change in theta and SE",
            ["theta (older)", "theta (newer)", "change", "SE older", "SE newer"],
            right=("theta (older)", "theta (newer)", "change", "SE older", "SE newer"),
        )
        for point in diff.scores:
            scores.add_row(
                f"{point.theta:.1f}",
                dash(point.to_theta, ".3f"),
                dash(point.change, "+.3f"),
                f"{point.from_se:.3f}",
                dash(point.to_se, ".3f"),
            )
        console.print(scores)
    console.print(f"  {diff.caution}", highlight=False)


def print_alias_history(name: str, aliases: dict[str, AliasRecord]) -> None:
    """Every alias of ``name``: where it points, and each move with its time and who made it (newest first)."""
    console = out_console()
    if not aliases:
        console.print(f"  {name} has no aliases", highlight=False)
        return
    table = new_table(f"aliases of {name} and their moves (newest first)", ["alias", "version", "moved at (UTC)", "by"])
    for alias, record in sorted(aliases.items()):
        for position, move in enumerate(reversed(record.history)):
            label = f"{alias} (now)" if position == 0 else ""
            table.add_row(label, str(move.version), move.moved_at, move.by)
    console.print(table)
