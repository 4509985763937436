"""Wording shared by the command line, the e-mails, the reports and the dashboard."""

#: The caution every output that shows estimates carries.
CAUTION = ("Caution: statistical estimates with model risk, not investment advice; follow your "
           "firm's model-risk policy and local regulation.")


def finite_level_note(q: float) -> str:
    """What a nonparametric tail figure at level ``q`` is, and its value for an independent
    pair (shown beside every such figure).

    Examples
    --------
    >>> finite_level_note(0.1)[:58]
    'Nonparametric tails C_n(q,q)/q at q = 0.1 are finite-level'
    """
    return (f"Nonparametric tails C_n(q,q)/q at q = {q:g} are finite-level tail concordances, "
            f"not the limit λ as q → 0: an independent pair gives q = {q:g} (a pair without "
            f"tail dependence reads about {q:g} or more, not 0).")
