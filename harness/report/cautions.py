"""The cautions printed wherever a verdict is read: run reports, comparisons, `sweep`, `compare`, `predict`.

One text in one place, so the terminal, the Markdown and the HTML say the same thing.
"""

from __future__ import annotations

__all__ = ["CAUTIONS", "SHORT_CAUTION"]

# The one-paragraph form, for the terminal (sweep, compare, predict).
SHORT_CAUTION = (
    "Before acting on these results: scores on invented or small test sets do not carry over to other data; "
    "if the labels feed decisions about people, keep a person reviewing them, check error rates per group, "
    "and follow local law and practice."
)

# The list form, for the comparison's Markdown and HTML.
CAUTIONS = (
    "Scores measured on an invented or small test set do not carry over: evaluate on data that represents "
    "the people and situations the classifier will meet.",
    "If the outputs feed decisions about people (moderation, triage, screening), keep a person in the loop "
    "who can review and overturn them, and check whether error rates differ across groups: join "
    "predictions.jsonl to your own group columns.",
    "Pretrained checkpoints carry the biases of the text they were trained on, and a fine-tuned classifier "
    "inherits them.",
    "Labels can be noisy or biased too: measure how far two annotators agree (`tiltyard agree`) before "
    "trusting small differences between groups.",
    "Data drifts after deployment: re-evaluate on fresh labelled data from time to time.",
    "Follow local law and your organisation's policy on automated decisions and personal data.",
)
