"""Plain-text summaries for the terminal."""
from __future__ import annotations

from typing import Any


def format_list(values: list, limit: int = 12) -> str:
    shown = ", ".join(str(v) for v in values[:limit])
    if len(values) > limit:
        shown += f", ... ({len(values) - limit} more)"
    return shown or "none"


def format_check_summary(summary: dict[str, Any]) -> str:
    """The human-readable face of ``smootharea check``."""
    lines = [f"Job: {summary['job']}", "", "Areas and counts"]
    lines.append(f"  areas                 {summary['areas']}")
    lines.append(f"  observed cases        {summary['observed_total']}")
    lines.append(f"  expected cases        {summary['expected_total']:.2f}")
    lines.append(f"  expected counts from  {summary['standardisation']}")
    lines += ["", "Neighbour graph"]
    lines.append(f"  links                 {summary['links']}")
    lines.append(f"  neighbours per area   mean {summary['mean_neighbours']:.2f}, "
                 f"max {summary['max_neighbours']}")
    lines.append(f"  islands               {format_list(summary['islands'])}")
    lines.append(f"  components (sizes)    {format_list(summary['components'])}")
    factors = [f"{f:.4f}" for f in summary["scaling_factors"]]
    lines.append(f"  BYM2 scaling factors  {format_list(factors)}")
    lines += ["", "Frequentist references"]
    lines.append(f"  Pearson overdispersion (chi2/df)  {summary['overdispersion']:.3f}"
                 + ("   (> 1: more variation than Poisson; smoothing is warranted)"
                    if summary["overdispersion"] > 1.2 else ""))
    moran = summary["morans_i"]
    if isinstance(moran, dict):
        lines.append(f"  Moran's I of GLM residuals        {moran.get('i', float('nan')):.3f} "
                     f"(permutation p = {moran.get('p_value', float('nan')):.3f})")
    lines.append("  Poisson GLM with log(E) offset:")
    for name, coefficient in summary["glm"].items():
        lines.append(f"    {name:<28} {coefficient['estimate']: .4f}  (SE {coefficient['std_error']:.4f})")
    if summary.get("warnings"):
        lines += ["", "Warnings"] + [f"  - {w}" for w in summary["warnings"]]
    lines += ["", f"Inputs are usable. ({summary.get('seconds', 0):.1f} s)"]
    return "\n".join(lines)
