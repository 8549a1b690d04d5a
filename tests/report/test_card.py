"""What the card says: the verdict with its rule and margin, the one-se label, plans worth
their cost, warnings beside a flagged pick, diverged trials; and that no password reaches it."""

from __future__ import annotations

import pandas as pd

from kablate.analysis.summary import analyze as analyze_rows
from kablate.report.card import render_card
from kablate.report.compose import scrub
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import data_json, plan, rows, with_predictions


def analyze(trials, curves=(), **pick):
    return analyze_rows(
        with_predictions(trials), list(curves), plan(), [], data_json(), PickSpec(**pick)
    )


def first_paragraph(text: str) -> str:
    return text.split("\n\n")[2]  # after the heading and the Generated line


def test_the_headline_names_the_rule_the_margin_and_the_verdict(card_context):
    # cheap (400 MACs) is 0.5 pp below base (1000 MACs) on seeds 0-1, 100 images each: its
    # lower bound is far below −1 pp, so the baseline is kept; a 10 pp margin lets it in.
    kept = render_card(analyze(rows()), card_context)
    head = first_paragraph(kept)
    verdict = head.split(". ")[0]  # the verdict, the rule and the margin in one sentence
    assert verdict.startswith("**Keep the baseline base**")
    assert "by non-inferiority with a 1.00 pp margin" in verdict
    assert "The closest, cheap: -0.50 pp" in head
    wide = first_paragraph(render_card(analyze(rows(), margin=10.0), card_context))
    assert wide.startswith(
        "**Recommended kernel plan: cheap** (`body=cheap`) by non-inferiority with a 10.00 pp "
        "margin, 0.40× the MACs"
    )


def test_the_one_se_rule_is_labelled_with_the_tolerance_it_used(card_context):
    a = analyze(rows(), rule="one-se", within_se=2.0)
    text = render_card(a, card_context)
    best_se = a.decision.accuracy["big"].interval_se
    assert (
        f"within 2 standard error(s) of the best plan's, a tolerance of {200 * best_se:.2f} pp"
        in text
    )
    assert "non-inferiority" not in first_paragraph(text)
    assert "by the one-standard-error rule (2 SE" in first_paragraph(text).split(". ")[0]
    # The qualifying plans and the table's column are the one-se rule's, not the margin's.
    d = a.decision
    within = [
        n for n, acc in d.accuracy.items() if acc.mean >= d.accuracy["big"].mean - d.tolerance
    ]
    assert set(d.qualifying) == set(within)
    assert f"Plans that qualified: {', '.join(d.qualifying)}." in text
    assert "| within tolerance | picked |" in text and "| within margin |" not in text


def test_a_costlier_plan_shown_better_is_listed_as_worth_its_cost_never_picked(card_context):
    trials = rows({"v0": [0.80, 0.81, 0.80], "v1": [0.60, 0.61, 0.60], "v2": [0.97, 0.98, 0.97]})
    a = analyze(trials)
    assert a.decision.recommended == "base" and a.decision.worth_cost == ("big",)
    text = render_card(a, card_context)
    assert "**Worth its cost?**" in text
    line = next(x for x in text.splitlines() if x.startswith("- big: "))
    assert "; 5.0k (5.00×) MACs (× the baseline's)." in line


def test_a_flagged_pick_carries_its_flag_in_the_headline(card_context):
    # cheap's training loss is still falling steeply at the end of every seed.
    falling = [2.0, 1.6, 1.3, 1.0, 0.8, 0.6]
    curves = [
        {
            "variant": "cheap",
            "seed": s,
            "epoch": e,
            "train_loss": loss,
            "val_loss": 1.0,
            "val_acc": 0.8,
            "seconds": 1.0,
        }
        for s in (0, 1, 2)
        for e, loss in enumerate(falling)
    ]
    text = render_card(analyze(rows(), curves, margin=10.0), card_context)
    head = first_paragraph(text)
    assert "**Recommended kernel plan: cheap**" in head
    assert "**Warning on cheap:** still learning at the last epoch in 3 of 3 seeds" in head


def test_diverged_trials_are_listed_and_named_in_the_caveats(card_context):
    trials = rows()
    for row in trials:
        if row["variant"] == "cheap" and row["seed"] == 2:
            row.update(status="diverged", val_acc=None, test_acc=None)
    text = render_card(analyze(trials), card_context)
    assert "| cheap | 2 | diverged |" in text
    assert "1 of 12 trials diverged (the training loss blew up)" in text
    assert "Training diverged on some seeds of cheap" in text
    assert "cheap: diverged in 1 of 3 seeds." in text


def test_an_unsettled_verdict_says_the_data_cannot_decide(card_context):
    # Identical accuracy on 100 images: the margin of 1 pp is inside the noise, so the verdict
    # (keep the baseline) is the rule's pick in only a minority of resamples.
    trials = rows({"v0": [0.90, 0.90, 0.90], "v1": [0.90, 0.90, 0.90], "v2": [0.90, 0.90, 0.90]})
    a = analyze(trials)
    assert a.decision.unstable
    assert "**The data cannot decide firmly:**" in first_paragraph(render_card(a, card_context))


def test_scrub_hides_passwords_in_urls_and_parameters():
    text = scrub(
        "postgresql://kb:s3cret@db/kb · postgresql://kb@db/kb?sslmode=require&password=s3cret"
        " · host=db password=s3cret user=kb"
    )
    assert "s3cret" not in text
    assert "kb:***@db" in text and "&password=***" in text and " password=*** user" in text


def test_the_variants_table_has_a_row_per_variant_with_its_difference(card_context):
    a = analyze(rows())
    table = pd.DataFrame(a.variants)
    text = render_card(a, card_context)
    for name in table["variant"]:
        assert any(x.startswith(f"| {name}") for x in text.splitlines()), name
    line = next(x for x in text.splitlines() if x.startswith("| cheap | `body=cheap` |"))
    assert "-0.50 pp [" in line


def test_when_every_plan_costs_more_the_verdict_says_so(card_context):
    # "cheap" made the costliest: no plan is cheaper than the baseline.
    p = plan()
    p["variants"][1]["macs"] = 9000
    a = analyze_rows(with_predictions(rows()), [], p, [], data_json(), PickSpec())
    head = first_paragraph(render_card(a, card_context))
    assert head.startswith("**Keep the baseline base**")
    assert "Every other plan costs more MACs than the baseline" in head
    assert "none is shown better than it" in head


def test_the_card_shows_activation_memory_and_the_weights_at_fp32_and_int8(card_context):
    p = plan()
    for v, mem in zip(p["variants"], (4000, 6000, 2000, 100), strict=True):
        v["act_mem_bytes"] = mem
    a = analyze_rows(with_predictions(rows()), [], p, [], data_json(), PickSpec())
    text = render_card(a, card_context)
    table = text.split("#### Memory")[1].split("####")[0]
    body = [line for line in table.splitlines() if line.startswith("| ") and "B |" in line]
    # least activation memory first; × the baseline's 4000 B; weights = params × 4 and × 1
    assert body == [
        "| never | 100B (0.03×) | 40B | 10B |",
        "| big | 2.0kB (0.50×) | 1.2kB | 300B |",
        "| base | 4.0kB (1.00×) | 400B | 100B |",
        "| cheap | 6.0kB (1.50×) | 200B | 50B |",
    ]
    # The recipe leaves batch_size out: the card names the schema's default, which the run
    # used, not a vague "the recipe's batch size".
    assert "one training step at batch 64 keeps" in table
    card_context.meta["resolved"]["recipe"]["batch_size"] = 32
    assert "one training step at batch 32 keeps" in render_card(a, card_context)


def test_the_memory_table_adds_inference_memory_where_it_was_measured(card_context):
    p = plan()
    for v, mem in zip(p["variants"], (4000, 6000, 2000, 100), strict=True):
        v["act_mem_bytes"], v["infer_mem_bytes"] = mem, mem // 10
    a = analyze_rows(with_predictions(rows()), [], p, [], data_json(), PickSpec())
    table = render_card(a, card_context).split("#### Memory")[1].split("####")[0]
    assert "| variant | activations per training step | at inference, batch 1 |" in table
    assert "| base | 4.0kB (1.00×) | 400B | 400B | 100B |" in table.splitlines()
    assert "peak of activation bytes alive at once" in table
