"""What the card says about diverged trials, the rule's tolerance and paired differences
without spread; and that no storage password reaches it."""

from __future__ import annotations

from kablate.analysis.summary import analyze
from kablate.report.build import scrub
from kablate.report.card import render_card
from tests.analysis.test_tables import plan, rows
from tests.report.test_plots import card_context


def test_diverged_trials_are_listed_and_named_in_the_caveats():
    trials = rows()
    for row in trials:
        if row["variant"] == "cheap" and row["seed"] == 2:
            row.update(status="diverged", val_acc=None, test_acc=None)
    text = render_card(analyze(trials, [], plan(), []), card_context())
    assert "| cheap | 2 | diverged |" in text
    assert "1 of 12 trials diverged (the training loss blew up)" in text
    assert "Training diverged on some seeds of cheap" in text
    row = next(x for x in text.splitlines() if x.startswith("| cheap | `body=cheap` |"))
    assert "| 2/3 |" in row  # the diverged seed is not counted


def test_tolerance_column_follows_the_rule():
    assert "| ±1 SE |" in render_card(analyze(rows(), [], plan(), []), card_context())
    text = render_card(analyze(rows(), [], plan(), [], within_se=2.0), card_context())
    assert "| ±2 SE |" in text and "*±2 SE*: within" in text and "±1 SE" not in text


def test_paired_differences_without_spread_have_no_interval_in_the_card():
    trials = rows()
    for row in trials:  # cheap: exactly one validation image (1/300) below base on each seed
        if row["variant"] == "cheap" and row["status"] == "done":
            base = next(r for r in trials if r["variant"] == "base" and r["seed"] == row["seed"])
            row["val_acc"] = base["val_acc"] - 1 / 300
    text = render_card(analyze(trials, [], plan(), []), card_context())
    line = next(x for x in text.splitlines() if x.startswith("| cheap | 3 |"))
    assert "none (no spread)" in line and "| 0.25 |" in line
    assert "not distinguishable from the baseline at n = 3" in line
    assert "exact two-sided sign test" in text


def test_scrub_hides_passwords_in_urls_and_parameters():
    text = scrub(
        "postgresql://kb:s3cret@db/kb · postgresql://kb@db/kb?sslmode=require&password=s3cret"
        " · host=db password=s3cret user=kb"
    )
    assert "s3cret" not in text
    assert "kb:***@db" in text and "&password=***" in text and " password=*** user" in text


def test_the_headline_says_how_the_recommended_plan_compares_with_the_baseline():
    a = analyze(rows(), [], plan(), [])
    assert a.selection.recommended == "big" and a.baseline == "base"
    text = render_card(a, card_context())
    headline = next(x for x in text.splitlines() if x.startswith("**Recommended kernel plan"))
    assert "Paired with the baseline on validation accuracy: " in headline
    assert a.comparisons["big"].verdict in headline
