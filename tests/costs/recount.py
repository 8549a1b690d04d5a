"""What plan.json promises of each variant and layer, and an independent recount of its costs
from its layers (standard conv arithmetic, not kablate's code), for the costs tests."""

from __future__ import annotations

VARIANT_FIELDS = {
    "id",
    "name",
    "plan",
    "params",
    "macs",
    "flops",
    "rf",
    "jump",
    "out_hw",
    "act_mem_bytes",
    "latency_ms",
    "layers",
}
LAYER_FIELDS = {
    "name",
    "kind",
    "in_ch",
    "out_ch",
    "kernel",
    "stride",
    "padding",
    "dilation",
    "groups",
    "in_hw",
    "out_hw",
    "params",
    "macs",
}


def recompute(layers: list[dict], norm_params_per_channel: int = 2) -> dict:
    """Standard conv arithmetic, written fresh from the JSON (not kablate's code):
    output size floor((n + pads − d(k − 1) − 1)/s) + 1 (torch.nn.Conv2d documentation);
    weights out·(in/groups)·kh·kw plus the folded norm's 2 per channel; MACs = weights per
    output value × output values; rf r += (d(k − 1))·j, j *= s (Araujo et al. 2019)."""
    r, j = [1, 1], [1, 1]
    params = macs = 0
    rf_at_head = None
    for x in layers:
        kh, kw = x["kernel"]
        if x["kind"] in ("conv", "pool"):
            top, bottom, left, right = x["padding"]
            (sh, sw), (dh, dw) = x["stride"], x["dilation"]
            h, w = x["in_hw"]
            out = [
                (h + top + bottom - dh * (kh - 1) - 1) // sh + 1,
                (w + left + right - dw * (kw - 1) - 1) // sw + 1,
            ]
            assert out == x["out_hw"], x["name"]
            for axis, (k, d, s) in enumerate(((kh, dh, sh), (kw, dw, sw))):
                r[axis] += d * (k - 1) * j[axis]
                j[axis] *= s
        if x["kind"] == "conv":
            weights = x["out_ch"] * (x["in_ch"] // x["groups"]) * kh * kw
            assert x["params"] == weights + norm_params_per_channel * x["out_ch"], x["name"]
            assert x["macs"] == weights * x["out_hw"][0] * x["out_hw"][1], x["name"]
        elif x["kind"] == "linear":
            assert x["params"] == x["in_ch"] * x["out_ch"] + x["out_ch"]
            assert x["macs"] == x["in_ch"] * x["out_ch"]
        elif x["kind"] == "global_pool":
            rf_at_head, jump_at_head = max(r), max(j)
            assert x["out_hw"] == [1, 1] and x["kernel"] == x["in_hw"]
        else:
            assert x["params"] == x["macs"] == 0
        params += x["params"]
        macs += x["macs"]
    return {"params": params, "macs": macs, "rf": rf_at_head, "jump": jump_at_head}
