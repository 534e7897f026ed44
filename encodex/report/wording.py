"""Sentences every reader-facing output repeats, kept in one place so they stay identical."""

from __future__ import annotations


def label_caveat(alpha: float) -> str:
    """The statement that must accompany every place a user reads labels.

    Parameters
    ----------
    alpha : float
        Significance level of the model comparison that produced the labels.
    """
    return (
        f"A label is a statistical statement at alpha = {alpha:g}: the cross-validated model "
        f"comparison found that the listed variables improved held-out prediction of this "
        f"cell's spikes during this session's behaviour. It is not proof of mechanism; a "
        f"variable left out may still be encoded but not detectable with these data."
    )


#: What an ``ambiguous_with`` flag means, in one sentence (tables, report).
AMBIGUITY_SENTENCE = (
    "A flag in ambiguous_with names variables, or combinations of variables such as "
    "position+direction, that this session's behaviour makes nearly interchangeable with the "
    "cell's label (concurvity of their spline terms of at least 0.8), so the data cannot say "
    "which of them the cell carries."
)
