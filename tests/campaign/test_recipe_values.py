"""Recipe values: a range gives exactly the points (keys, seeds) its decimals give in a list."""

from __future__ import annotations

import tomllib

import pytest

from sweepctl.campaign.plan import replica_seed
from sweepctl.campaign.recipe import Goal, Recipe, parse_recipe
from tests.campaign.helpers import recipe_text


def _recipe(couplings):
    return parse_recipe(tomllib.loads(recipe_text({"axes": {"couplings": couplings}})))


@pytest.mark.parametrize(
    ("start", "stop", "num", "written"),
    [
        (-0.2, 0.1, 4, [-0.2, -0.1, 0.0, 0.1]),  # through zero: binary steps give 2.78e-17
        (-0.3, 0.3, 7, [-0.3, -0.2, -0.1, 0.0, 0.1, 0.2, 0.3]),
        (0.05, 0.35, 4, [0.05, 0.15, 0.25, 0.35]),
        (-1.0, 1.0, 9, [-1.0, -0.75, -0.5, -0.25, 0.0, 0.25, 0.5, 0.75, 1.0]),
    ],
)
def test_a_range_equals_the_same_decimals_written_as_a_list(start, stop, num, written):
    ranged = _recipe({"start": start, "stop": stop, "num": num})
    listed = _recipe(written)
    assert ranged.couplings == tuple(written)  # the very floats the decimals denote
    assert [p.key for p in ranged.points()] == [p.key for p in listed.points()]
    e = 0x1234
    for a, b in zip(ranged.points(), listed.points(), strict=True):
        assert replica_seed(e, a, 3).generate_state(4).tolist() == (
            replica_seed(e, b, 3).generate_state(4).tolist()
        )


def test_zero_from_a_range_is_the_critical_point_itself():
    ranged = _recipe({"start": -0.2, "stop": 0.1, "num": 4})
    zero = [p for p in ranged.points() if abs(p.x) < 1e-9]
    assert zero and all(p.x == 0.0 and "x=0.0" in p.key for p in zero)


def test_a_goal_is_read_and_kept_in_the_canonical_form():
    # a goal needs three widths (two give only an effective exponent)
    text = recipe_text(
        {"axes": {"widths": [2, 3, 4]}, "goal": {"nu_halfwidth": 0.05, "cpu_hours": 2000}}
    )
    r = parse_recipe(tomllib.loads(text))
    assert r.goal == Goal(nu_halfwidth=0.05, cpu_hours=2000.0)
    # the recipe recorded in a store gives the goal back
    assert Recipe.from_canonical(r.canonical()).goal == r.goal
    # without [goal] the canonical form has no goal key (old stores' digests stay valid)
    plain = parse_recipe(tomllib.loads(recipe_text()))
    assert plain.goal is None and "goal" not in plain.canonical()
    assert plain.digest() != r.digest()
