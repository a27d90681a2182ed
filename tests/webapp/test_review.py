"""Review workflow: rules, role matrix over the API, signatures, withdrawal, reinstatement.

The rules follow DESIGN.md section 6 (our product contract).  Signature content follows
US FDA 21 CFR Part 11 section 11.50 (printed name, date and time, meaning) and 11.200(a)
(two identification components at signing: user id + password); the four-eyes rule
(proposer never signs) is common practice in GMP review (EU GMP Annex 11, 2011, section 14).
"""

from __future__ import annotations

import pytest

from analysis.errors import InputError
from webapp.services import review_rules as rules

KNOWN = [f"S{i}" for i in range(1, 11)]


# --- rules without a database -------------------------------------------------------------


@pytest.mark.parametrize(
    "role,allowed", [("viewer", False), ("analyst", True), ("reviewer", True), ("admin", True)]
)
def test_who_may_propose(role, allowed):
    if allowed:
        rules.check_can_propose(role)
    else:
        with pytest.raises(rules.ReviewRefused) as err:
            rules.check_can_propose(role)
        assert err.value.status == 403


@pytest.mark.parametrize(
    "role,allowed", [("viewer", False), ("analyst", False), ("reviewer", True), ("admin", True)]
)
def test_who_may_sign(role, allowed):
    kwargs = dict(signer_id=2, role=role, proposed_by=1, state="proposed")
    if allowed:
        rules.check_can_sign(**kwargs)
    else:
        with pytest.raises(rules.ReviewRefused) as err:
            rules.check_can_sign(**kwargs)
        assert err.value.status == 403


def test_proposer_never_signs_own_proposal_even_as_reviewer():
    with pytest.raises(rules.ReviewRefused, match="own proposal"):
        rules.check_can_sign(signer_id=1, role="reviewer", proposed_by=1, state="proposed")


@pytest.mark.parametrize("state", ["approved", "rejected", "withdrawn"])
def test_decided_proposals_are_closed(state):
    with pytest.raises(rules.ReviewRefused) as err:
        rules.check_can_sign(signer_id=2, role="reviewer", proposed_by=1, state=state)
    assert err.value.status == 409
    with pytest.raises(rules.ReviewRefused):
        rules.check_can_withdraw(user_id=1, proposed_by=1, state=state)


def test_only_the_proposer_withdraws():
    rules.check_can_withdraw(user_id=1, proposed_by=1, state="proposed")
    with pytest.raises(rules.ReviewRefused, match="only the proposer"):
        rules.check_can_withdraw(user_id=2, proposed_by=1, state="proposed")


def _check(**overrides):
    args = dict(
        action="exclude",
        samples=["S3", "S1"],
        reason_category="measurement error",
        reason="  pipette fault noted in the bench log ",
        known_samples=KNOWN,
        excluded_now=[],
    )
    args.update(overrides)
    return rules.check_proposal(**args)


def test_valid_proposal_is_cleaned_and_sorted():
    assert _check() == (["S1", "S3"], "measurement error", "pipette fault noted in the bench log")


@pytest.mark.parametrize(
    "overrides,message",
    [
        ({"reason": "   "}, "reason is required"),
        ({"reason": None}, "reason is required"),
        ({"reason_category": "looked odd"}, "reason_category must be one of"),
        ({"samples": []}, "non-empty list"),
        ({"samples": ["S1", "S1"]}, "listed twice: S1"),
        ({"samples": ["S1", "nope"]}, "unknown sample id.*nope"),
        ({"excluded_now": ["S3"]}, "already excluded.*S3"),
        ({"action": "reinstate"}, "not excluded now.*S1, S3"),
        ({"action": "delete"}, "action must be one of"),
        ({"samples": KNOWN[:8]}, "would leave 2"),
    ],
)
def test_bad_proposals_are_refused_with_a_clear_message(overrides, message):
    with pytest.raises(InputError, match=message):
        _check(**overrides)


def test_reinstate_needs_the_samples_to_be_excluded():
    assert _check(action="reinstate", excluded_now=["S1", "S3", "S5"])[0] == ["S1", "S3"]


def test_exclusions_fold_in_decision_order():
    decided = [("exclude", ["S1", "S2"]), ("exclude", ["S5"]), ("reinstate", ["S2"]), ("exclude", ["S2"])]
    assert rules.fold_exclusions(decided) == ["S1", "S2", "S5"]
    assert rules.fold_exclusions(decided[:3]) == ["S1", "S5"]
    assert rules.after_exclusions("reinstate", ["S1"], ["S1", "S5"]) == ["S5"]
