"""Rules of the review workflow, free of any database: who may do what, when.

Proposal states: proposed -> approved | rejected | withdrawn (docs/design.md section 6).
Roles: viewer < analyst < reviewer; admin also has reviewer rights.  A proposer
never signs their own proposal (four-eyes principle, in the spirit of
21 CFR Part 11 11.10 and EU GMP Annex 11 section 14; no compliance is claimed).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from analysis.errors import InputError

REASON_CATEGORIES = (
    "measurement error",
    "sample mix-up",
    "process deviation",
    "extreme but valid",
    "careless response",
    "other",
)
PROPOSAL_ACTIONS = ("exclude", "reinstate")
MEANINGS = {"approve": "approved", "reject": "rejected"}
MAX_REASON_CHARS = 4000
MAX_COMMENT_CHARS = 4000
MIN_MODEL_SAMPLES = 3  # fewer samples than this leave nothing to fit a model on

_CAN_PROPOSE = {"analyst", "reviewer", "admin"}
_CAN_SIGN = {"reviewer", "admin"}


class ReviewRefused(InputError):
    """A review action the rules do not allow; ``status`` is the HTTP status the API uses."""

    def __init__(self, message: str, *, code: str, status: int):
        super().__init__(message)
        self.code = code
        self.status = status


def forbidden(message: str) -> ReviewRefused:
    return ReviewRefused(message, code="forbidden", status=403)


def conflict(message: str) -> ReviewRefused:
    return ReviewRefused(message, code="conflict", status=409)


def check_can_propose(role: str, what: str = "exclusions") -> None:
    if role not in _CAN_PROPOSE:
        raise forbidden(f"a {role} cannot propose {what}; analysts and reviewers can")


def check_can_sign(*, signer_id: int, role: str, proposed_by: int, state: str) -> None:
    """Refuse a signature by a viewer/analyst, by the proposer, or on a decided proposal."""
    if role not in _CAN_SIGN:
        raise forbidden(f"a {role} cannot sign proposals; reviewers can")
    if signer_id == proposed_by:
        raise forbidden("the proposer cannot sign their own proposal; a second reviewer must")
    check_open(state)


def check_can_withdraw(*, user_id: int, proposed_by: int, state: str) -> None:
    if user_id != proposed_by:
        raise forbidden("only the proposer can withdraw a proposal")
    check_open(state)


def check_open(state: str) -> None:
    if state != "proposed":
        raise conflict(f"this proposal is already {state}; nothing can change it now")


def clean_text(value, *, field: str, limit: int, required: bool) -> str:
    """Strip a free-text field and check it; user text is stored as typed (shown as text)."""
    if value is None:
        value = ""
    if not isinstance(value, str):
        raise InputError(f"The {field} must be text, not {type(value).__name__}.", field=field)
    text = value.strip()
    if required and not text:
        raise InputError(f"The {field} is required: say in words why.", field=field)
    if len(text) > limit:
        raise InputError(f"The {field} is {len(text)} characters long; shorten it to at most {limit}.", field=field)
    return text


def check_proposal(
    *,
    action: str,
    samples,
    reason_category,
    reason,
    known_samples: Sequence[str],
    excluded_now: Iterable[str],
) -> tuple[list[str], str, str]:
    """Validate a proposal; return (sorted sample ids, category, cleaned reason).

    Exclude: every sample must exist and not be excluded already.  Reinstate:
    every sample must be excluded now (reinstating is how an approved exclusion
    is reversed).
    """
    if action not in PROPOSAL_ACTIONS:
        raise InputError(f"action must be one of {', '.join(PROPOSAL_ACTIONS)}, got {action!r:.80}", field="action")
    if not isinstance(samples, (list, tuple)) or not samples:
        raise InputError("samples must be a non-empty list of sample ids", field="samples")
    ids = []
    for value in samples:
        if not isinstance(value, (str, int)) or isinstance(value, bool):
            raise InputError(f"sample id {value!r:.80} in samples is not text", field="samples")
        ids.append(str(value))
    duplicates = sorted({s for s in ids if ids.count(s) > 1})
    if duplicates:
        raise InputError(f"sample id(s) listed twice: {', '.join(duplicates)}")
    known = set(known_samples)
    unknown = [s for s in ids if s not in known]
    if unknown:
        raise InputError(f"unknown sample id(s) in this dataset: {', '.join(unknown[:10])}")
    excluded = set(excluded_now)
    if action == "exclude":
        already = sorted(s for s in ids if s in excluded)
        if already:
            raise InputError(f"already excluded by an approved proposal: {', '.join(already)}")
        if len(known) - len(excluded) - len(ids) < MIN_MODEL_SAMPLES:
            raise InputError(
                f"excluding {len(ids)} sample(s) would leave {len(known) - len(excluded) - len(ids)}; "
                f"a model needs at least {MIN_MODEL_SAMPLES}"
            )
    else:
        not_excluded = sorted(s for s in ids if s not in excluded)
        if not_excluded:
            raise InputError(f"not excluded now, so nothing to reinstate: {', '.join(not_excluded)}")
    if reason_category not in REASON_CATEGORIES:
        given = "none was chosen" if reason_category in (None, "") else f"{reason_category!r} is not one of them"
        raise InputError(
            f"Choose a reason category ({', '.join(REASON_CATEGORIES)}); {given}.", field="reason_category"
        )
    text = clean_text(reason, field="reason", limit=MAX_REASON_CHARS, required=True)
    return sorted(ids), reason_category, text


def check_not_in_open_proposal(samples: Iterable[str], open_proposals: Iterable[tuple[int, Iterable[str]]]) -> None:
    """Refuse (409) samples that already sit in another undecided proposal of the dataset.

    ``open_proposals`` yields ``(proposal_id, samples)`` of the proposals still
    ``proposed``.  One sample in two open proposals could otherwise be decided
    twice, each decision checked against a state the other one changes.
    """
    wanted = set(samples)
    taken = [(s, pid) for pid, theirs in open_proposals for s in sorted(wanted.intersection(theirs))]
    if taken:
        named = ", ".join(f"{s} (open proposal {pid})" for s, pid in taken[:20])
        raise conflict(
            f"sample(s) already in another open proposal: {named}; that proposal must be approved, "
            "rejected or withdrawn before the sample can be proposed again"
        )


def check_approval(*, proposal_id: int, action: str, samples: Iterable[str], n_samples: int,
                   excluded_now: Iterable[str]) -> list[str]:
    """Re-check a proposal at approval against the exclusions approved by then; return the exclusions after it.

    A proposal is checked when it is made, but other proposals may be approved
    before it: refuse (409) an exclusion whose samples were excluded meanwhile,
    a reinstatement whose samples were reinstated meanwhile, and any approval
    that would leave fewer than ``MIN_MODEL_SAMPLES`` of the ``n_samples``.
    """
    ids = sorted(samples)
    excluded = set(excluded_now)
    if action == "exclude":
        moved = [s for s in ids if s in excluded]
        what = "excluded meanwhile by another approved proposal"
    else:
        moved = [s for s in ids if s not in excluded]
        what = "not excluded any more (reinstated meanwhile by another approved proposal)"
    if moved:
        raise conflict(
            f"proposal {proposal_id} cannot be approved: sample(s) {', '.join(moved[:20])} "
            f"{'was' if len(moved) == 1 else 'were'} {what}; reject it instead"
        )
    after = after_exclusions(action, ids, excluded)
    left = n_samples - len(after)
    if left < MIN_MODEL_SAMPLES:
        raise conflict(
            f"proposal {proposal_id} cannot be approved: it would leave {left} of the dataset's {n_samples} "
            f"samples ({len(after)} excluded), and a model needs at least {MIN_MODEL_SAMPLES}; "
            "reject it, or reinstate samples first"
        )
    return after


def fold_exclusions(approved: Iterable[tuple[str, Iterable[str]]]) -> list[str]:
    """Apply approved proposals in decision order: exclude adds, reinstate removes.

    ``approved`` yields ``(action, samples)``; returns the sorted excluded ids.
    """
    excluded: set[str] = set()
    for action, samples in approved:
        if action == "exclude":
            excluded.update(samples)
        elif action == "reinstate":
            excluded.difference_update(samples)
        else:
            raise ValueError(f"unknown proposal action {action!r}")
    return sorted(excluded)


def after_exclusions(action: str, samples: Iterable[str], excluded_now: Iterable[str]) -> list[str]:
    """The exclusion set a proposal would produce if approved."""
    return fold_exclusions([("exclude", excluded_now), (action, samples)])
