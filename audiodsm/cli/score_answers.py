"""``audiodsm score-answers``: score the answers saved from a listening page against its key."""

from __future__ import annotations

import json

import click

__all__ = ["score_answers"]


@click.command("score-answers")
@click.argument("answers_path", metavar="ANSWERS", type=click.Path(dir_okay=False))
@click.option(
    "--key",
    "key_path",
    required=True,
    type=click.Path(dir_okay=False),
    help="The set's key file (<folder>.key.json, beside the set folder).",
)
@click.option("--json", "as_json", is_flag=True, help="Print the scores as JSON.")
def score_answers(answers_path, key_path, as_json):
    """Score the blind-trial ANSWERS saved from a listening page against the set's key.

    Per pair: trials, right answers, the exact one-sided binomial p-value and a verdict.

    The answers must belong to the key (same set and trials, unedited, complete); otherwise
    the command says why and exits with status 2.
    """
    from audiodsm.evaluate.trial_scores import score_answers as score
    from audiodsm.evaluate.trial_scores import scores_table

    scores = score(answers_path, key_path)
    if as_json:
        click.echo(json.dumps({"pairs": [s.to_dict() for s in scores]}))
        return
    for line in scores_table(scores):
        click.echo(line)
