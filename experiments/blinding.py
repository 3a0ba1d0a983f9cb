"""Who may see a trial's condition: the one rule every page, export, figure and back-office view asks.

While a study is blind (blinded and not yet unblinded), a trial's condition and everything that
gives it away (replicate number, stimulus type and settings, the values derived from them, the
operator's note, a manager's override reason and the limits it broke, the names and captions
of its files) is shown only to that trial's operator: the person who ran it, who had to know the
condition to apply it. For a slot not yet run, the operator who claimed it (SlotClaim) sees its
condition and nobody else does.

Everyone else is blinded, whatever their role: the study's owner (the owner's analysis waits
for unblinding; until then the study page shows pooled figures only), other researchers,
technicians, managers and superusers. Whatever describes the whole allocation (the condition
labels, the reference condition, the seed, the allocation list, analyses by condition) is
hidden from everyone while the study is blind, operators included: an operator knows only
the trials they ran. Unblinding (the owner, or a manager who must see, with a reason; kept in
the history) shows everything to everyone.

Pure functions of the objects they are given: no query unless a docstring says so.
"""
from __future__ import annotations

from django.db.models import Q

from .models import SETTING_FIELDS

BLINDED = "blinded"

# Trial fields that give the condition away; the back office, the history and the exports leave
# them out (or write BLINDED) for a trial whose condition the viewer may not see.
HIDDEN_TRIAL_FIELDS = frozenset({"condition", "replicate", "kind", *SETTING_FIELDS, "substance", "mechanical_note",
                                 "dose_mj_cm2", "field_v_cm", "pulse_on_s", "train_s", "note"})
# The allocation (slot -> condition) is the key itself; the labels and the reference name the conditions;
# the seed with the design (conditions x replicates) rebuilds the allocation.
HIDDEN_STUDY_FIELDS = frozenset({"allocation", "conditions", "reference_condition", "seed"})
HIDDEN_OVERRIDE_FIELDS = frozenset({"reason", "breaches"})  # they name the stimulus settings
HIDDEN_ATTACHMENT_FIELDS = frozenset({"name", "file", "caption"})  # the operator's file name may name the condition

# Protocol limits a deviation may name while the study is blind: they hold for any stimulus. The
# others (dose, irradiance, voltage, wavelength, substance...) would tell which stimulus was used.
NEUTRAL_LIMITS = frozenset({"protocol", "cohort_ended", "cohort_size", "animals", "exposures", "rest"})


def study_is_blind(study) -> bool:
    """The allocation and analyses by condition are hidden from everyone."""
    return study.blinded and study.unblinded_at is None


def may_see_condition(user, trial) -> bool:
    """The study is not blind, or `user` ran this trial (needs trial.study loaded)."""
    if not study_is_blind(trial.study):
        return True
    return user is not None and user.pk is not None and trial.run_by_id == user.pk


def may_see_slot(user, study, claim) -> bool:
    """A slot's condition before its trial exists: the study is not blind, or `claim` (the slot's
    active SlotClaim or None) is `user`'s."""
    if not study_is_blind(study):
        return True
    return claim is not None and claim.released_at is None and user.pk is not None and claim.claimed_by_id == user.pk


def visible_q(user, prefix: str = "") -> Q:
    """Trials whose condition `user` may see, as a filter (prefix: the path to the trial, e.g. "trial__")."""
    q = Q(**{f"{prefix}study__blinded": False}) | Q(**{f"{prefix}study__unblinded_at__isnull": False})
    if user is not None and user.pk is not None:
        q |= Q(**{f"{prefix}run_by_id": user.pk})
    return q


def neutral_limit(limit: str) -> str:
    """How a deviation names a broken limit while the study is blind."""
    return limit if limit in NEUTRAL_LIMITS else "a stimulus limit"


def masked_name(attachment) -> str:
    """The file name a blinded viewer sees and downloads: the trial's code and the file's number."""
    extension = attachment.name.rsplit(".", 1)[-1].lower() if "." in attachment.name else ""
    extension = extension if extension.isalnum() and len(extension) <= 5 else ""
    return f"{attachment.trial.code}-file-{attachment.pk}" + (f".{extension}" if extension else "")
