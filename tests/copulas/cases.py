"""Parameter cases driving the generic property suite: every family, every rotation.

Each case is (family name, rotation, parameters). Parameters are chosen to span weak, moderate
and strong dependence inside each family's fit box.
"""

from __future__ import annotations

BASE_CASES: dict[str, list[tuple[float, ...]]] = {
    "independence": [()],
    "gaussian": [(0.5,), (-0.7,), (0.95,)],
    "student_t": [(0.5, 4.0), (-0.3, 10.0), (0.9, 2.5)],
    "clayton": [(2.0,), (0.3,), (8.0,)],
    "gumbel": [(2.0,), (1.2,), (6.0,)],
    "frank": [(5.0,), (-3.0,), (15.0,)],
    "joe": [(2.0,), (1.3,), (5.0,)],
    "bb1": [(0.5, 1.5), (2.0, 2.0), (0.2, 1.1)],
    "bb7": [(1.5, 1.0), (3.0, 2.0), (1.2, 0.3)],
}

ROTATED = ("clayton", "gumbel", "joe", "bb1", "bb7")


def all_cases() -> list[tuple[str, int, tuple[float, ...]]]:
    """Every base case at rotation 0, and the first case of each rotatable family at 90/180/270."""
    cases = [(name, 0, p) for name, plist in BASE_CASES.items() for p in plist]
    cases += [(name, r, BASE_CASES[name][0]) for name in ROTATED for r in (90, 180, 270)]
    return cases


def case_id(case: tuple[str, int, tuple[float, ...]]) -> str:
    name, rotation, params = case
    return f"{name}-{rotation}-" + "-".join(f"{x:g}" for x in params)
