"""Cost filters: drop variants before anything trains, and say why."""

from __future__ import annotations

from kablate.spec.schema import FilterSpec


def filter_reason(
    params: int, macs: int, rf: int, baseline_rf: int, filters: FilterSpec, act_mem: int = 0
) -> str | None:
    """Why a variant with these costs is dropped, or None when it is kept."""
    if filters.max_params and params > filters.max_params:
        return f"params {params:,} > max_params {filters.max_params:,}"
    if filters.max_macs and macs > filters.max_macs:
        return f"MACs {macs:,} > max_macs {filters.max_macs:,}"
    if filters.max_act_mem and act_mem > filters.max_act_mem:
        return f"act mem {act_mem:,} B > max_act_mem {filters.max_act_mem:,}"
    if filters.min_rf and rf < filters.min_rf:
        return f"rf {rf} < min_rf {filters.min_rf}"
    if filters.max_rf and rf > filters.max_rf:
        return f"rf {rf} > max_rf {filters.max_rf}"
    if filters.equal_rf and rf != baseline_rf:
        return f"rf {rf} ≠ the baseline's {baseline_rf} (equal_rf)"
    return None
