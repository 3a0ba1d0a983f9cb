"""Image measurements of trials: from an upload to stored metrics, a proposed outcome and study agreement.

Where the work runs
    A small measurement (frames × working pixels up to settings.IMAGING_SYNC_MAX_PIXELS, about a
    dozen dish photos) is measured in the request. A larger one goes to a thread pool in this
    process (concurrent.futures from the standard library, one worker, so measuring never takes
    both cores of a small server): the page shows a progress bar fed by a small JSON view. The
    worker claims the row (queued → running, one UPDATE that only one claimant can win), writes
    progress and a heartbeat after every frame, and saves the result with its history. A process
    that stops takes its queue with it: a row with no heartbeat for STALE_AFTER_S is shown as
    interrupted and may be measured again (a new row; the old one is marked interrupted, never
    removed).

Integrity
    The files are stored as the trial's attachments with the SHA-256 of the bytes received; the
    worker hashes each file again before measuring and fails if it changed. Every setting, every
    frame time and the library versions are stored with the result.
"""
from __future__ import annotations

import hashlib
import logging
import os
import socket
import threading
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

from django.conf import settings as django_settings
from django.core.exceptions import PermissionDenied
from django.db import close_old_connections, connection, transaction
from django.utils import timezone

from . import agreement, blinding, frames, imaging, services
from .models import Attachment, ImageMeasurement, Trial

log = logging.getLogger(__name__)

WORKER = f"{socket.gethostname()[:30]}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
SAME_SCORE_S = 0.5  # a score within half a second of the proposal is the proposal (forms keep one decimal)

_executor: ThreadPoolExecutor | None = None
_executor_lock = threading.Lock()


def executor() -> ThreadPoolExecutor:
    global _executor
    with _executor_lock:
        if _executor is None:
            _executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="vermilog-measure")
        return _executor


@dataclass(frozen=True)
class Options:
    """What the person chose on the upload form."""

    interval_s: float
    stimulus_at_s: float = 0.0
    threshold: float = imaging.DEFAULT_THRESHOLD
    scale_px_per_mm: float | None = None
    segmentation: imaging.Segmentation = field(default_factory=imaging.Segmentation)


def _versions() -> dict:
    import av
    import imageio
    import numpy
    import skimage

    return {"scikit-image": skimage.__version__, "numpy": numpy.__version__, "imageio": imageio.__version__,
            "av": av.__version__}


def _plan(source: str, uploads: list, options: Options, window_s: int) -> frames.Plan:
    try:
        if source == ImageMeasurement.Source.VIDEO:
            return frames.probe_video(uploads[0], uploads[0].name, interval_s=options.interval_s,
                                      stimulus_at_s=options.stimulus_at_s, until_s=window_s)
        return frames.probe_photos(uploads, [u.name for u in uploads], interval_s=options.interval_s,
                                   stimulus_at_s=options.stimulus_at_s, until_s=window_s)
    except frames.FrameError as error:
        raise services.Refused(f"{error} Nothing was stored.") from None


def _working_pixels(plan: frames.Plan, segmentation: imaging.Segmentation) -> int:
    factor = min(1.0, segmentation.max_side_px / max(plan.width_px, plan.height_px))
    return int(len(plan.times_s) * plan.width_px * plan.height_px * factor ** 2)


def start(*, user, trial: Trial, source: str, uploads: list, options: Options,
          background: bool | None = None) -> ImageMeasurement:
    """Store the files as attachments and the measurement request, then measure (here or in the background).

    background: None decides by size; False measures now (the demo, a command); True always queues.
    """
    services.require_study_owner(user, trial.study, "measure images")
    if source == ImageMeasurement.Source.VIDEO and len(uploads) != 1:
        raise services.Refused(f"Files: a video is measured on its own; {len(uploads)} files were given.")
    plan = _plan(source, uploads, options, trial.observation_window_s)
    kind = Attachment.Kind.VIDEO if source == ImageMeasurement.Source.VIDEO else Attachment.Kind.PHOTO
    used = ({i for i, _t in frames.photo_times(len(uploads), interval_s=options.interval_s,
                                                stimulus_at_s=options.stimulus_at_s, until_s=trial.observation_window_s)}
            if source == ImageMeasurement.Source.PHOTOS else {0})
    now = timezone.now()
    with transaction.atomic():
        stored = [services.add_attachment(user=user, trial=trial, upload=u, kind=kind,
                                          caption=f"Measured for dispersal ({'frame %d' % (i + 1) if kind == 'photo' else 'video'})")
                  for i, u in enumerate(uploads)]
        files = [{"attachment": a.pk, "name": a.name, "sha256": a.sha256, "size_bytes": a.size_bytes,
                  "frame": i + 1, "measured": i in used} for i, a in enumerate(stored)]
        digest = stored[0].sha256 if kind == Attachment.Kind.VIDEO else \
            hashlib.sha256("".join(a.sha256 for a in stored).encode()).hexdigest()
        measurement = ImageMeasurement(
            trial=trial, source=source, files=files, sha256=digest, threshold=options.threshold,
            window_s=trial.observation_window_s, frames_total=len(plan.times_s), status=ImageMeasurement.Status.QUEUED,
            worker=WORKER, heartbeat_at=now, requested_by=user, requested_at=now,
            settings={"segmentation": options.segmentation.as_dict(), "interval_s": options.interval_s,
                      "stimulus_at_s": options.stimulus_at_s, "threshold": options.threshold,
                      "window_s": trial.observation_window_s, "scale_px_per_mm": options.scale_px_per_mm,
                      "times_s": list(plan.times_s), "frame_size_px": [plan.width_px, plan.height_px],
                      "video_duration_s": plan.duration_s, "versions": _versions()})
        services._save(measurement, user, "Image measurement requested")
    if background is None:
        background = _working_pixels(plan, options.segmentation) > django_settings.IMAGING_SYNC_MAX_PIXELS
    if background:
        transaction.on_commit(lambda: executor().submit(run_in_background, measurement.pk))
    else:
        run(measurement.pk)
        measurement.refresh_from_db()
    return measurement


def run_in_background(pk: int) -> None:
    close_old_connections()
    try:
        run(pk, report=True)
    finally:
        connection.close()  # this thread's own connection


def _claim(pk: int) -> bool:
    now = timezone.now()
    return bool(ImageMeasurement.objects.filter(pk=pk, status=ImageMeasurement.Status.QUEUED, voided_at__isnull=True)
                .update(status=ImageMeasurement.Status.RUNNING, started_at=now, heartbeat_at=now, worker=WORKER))


def _report(pk: int, done: int) -> None:
    now = timezone.now()
    ImageMeasurement.objects.filter(pk=pk).update(frames_done=done, heartbeat_at=now)
    # The rows waiting behind this one in the same process are alive too.
    ImageMeasurement.objects.filter(worker=WORKER, status=ImageMeasurement.Status.QUEUED).update(heartbeat_at=now)


def _open_checked(attachment: Attachment):
    actual = services.file_checksum(attachment)
    if actual != attachment.sha256:
        # Named by the trial's code, never the uploaded name: the error is stored and shown to blinded viewers.
        raise frames.FrameError(f"File '{blinding.masked_name(attachment)}' changed since it was stored (SHA-256 {actual[:12]}… "
                                f"instead of {attachment.sha256[:12]}…); it is not measured.")
    return attachment.file.open("rb")


def _measure(m: ImageMeasurement, progress) -> imaging.SeriesMetrics:
    cfg = m.settings
    segmentation = imaging.Segmentation(**cfg["segmentation"])
    scale = cfg.get("scale_px_per_mm")
    attachments = Attachment.objects.in_bulk([f["attachment"] for f in m.files])
    measured, times = [], []

    def add(t: float, image) -> None:
        try:
            measured.append(imaging.measure_frame(image, scale_px_per_mm=scale, settings=segmentation))
        except ValueError as error:
            raise frames.FrameError(f"Frame at {t:g} s: {error}") from None
        times.append(t)
        if progress:
            progress(len(measured))

    if m.source == ImageMeasurement.Source.VIDEO:
        attachment = attachments[m.files[0]["attachment"]]
        handle = _open_checked(attachment)
        try:
            plan = frames.Plan(times_s=tuple(cfg["times_s"]), width_px=cfg["frame_size_px"][0],
                               height_px=cfg["frame_size_px"][1], duration_s=cfg.get("video_duration_s"))
            for t, image in frames.video_frames(handle, plan, stimulus_at_s=cfg["stimulus_at_s"]):
                add(t, image)
        finally:
            handle.close()
    else:
        pairs = frames.photo_times(len(m.files), interval_s=cfg["interval_s"], stimulus_at_s=cfg["stimulus_at_s"],
                                   until_s=m.window_s)
        for index, t in pairs:
            attachment = attachments[m.files[index]["attachment"]]
            handle = _open_checked(attachment)
            try:
                try:
                    image = frames.read_photo(handle)
                except frames.FrameError as error:
                    raise frames.FrameError(f"Photo '{blinding.masked_name(attachment)}' {error}") from None
            finally:
                handle.close()
            add(t, image)
    if not measured:
        raise frames.FrameError("No frame could be read after the stimulus.")
    return imaging.summarise(measured, times, threshold=m.threshold, window_s=m.window_s, settings=segmentation,
                             scale_px_per_mm=scale)


def run(pk: int, *, report: bool = False) -> None:
    """Measure one queued row; never raises (a failure is stored on the row with its message)."""
    if not _claim(pk):
        return
    m = ImageMeasurement.objects.get(pk=pk)
    try:
        series = _measure(m, (lambda done: _report(pk, done)) if report else None)
    except (frames.FrameError, ValueError) as error:
        _finish(pk, error=str(error))
        return
    except Exception as error:  # noqa: BLE001 - stored for the user; the traceback goes to the log
        log.exception("Image measurement %s failed", pk)
        _finish(pk, error=f"The measurement stopped on an unexpected error ({error.__class__.__name__}: {error}).")
        return
    _finish(pk, series=series)


def _finish(pk: int, *, series: imaging.SeriesMetrics | None = None, error: str = "") -> None:
    with transaction.atomic():
        m = ImageMeasurement.objects.select_for_update().select_related("requested_by").get(pk=pk)
        if m.status != ImageMeasurement.Status.RUNNING or m.worker != WORKER:
            return  # marked interrupted and measured again meanwhile: this result is not wanted
        m.finished_at = timezone.now()
        if series is None:
            m.status, m.error = ImageMeasurement.Status.FAILED, error[:2000]
            reason = f"Image measurement failed: {m.error}"
        else:
            m.status, m.error = ImageMeasurement.Status.DONE, ""
            m.frames = series.rows()
            m.frames_done = m.frames_total = len(series.frames)
            m.dispersal_time_s, m.censored = series.dispersal_time_s, series.censored
            m.observed_until_s = series.observed_until_s
            reason = ("Measured: still clumped at the last frame (censored)" if series.censored
                      else f"Measured: dispersed at {series.dispersal_time_s:g} s")
        services._save(m, m.requested_by, reason)


def rerun(*, user, measurement: ImageMeasurement) -> ImageMeasurement:
    """Measure the same files with the same settings again, after a failure or an interruption."""
    services.require_study_owner(user, measurement.trial.study, "measure images")
    with transaction.atomic():
        old = ImageMeasurement.objects.select_for_update().select_related("trial__study").get(pk=measurement.pk)
        if old.is_voided:
            raise services.Refused(f"Measurement #{old.pk} is voided.")
        if not old.may_rerun:
            raise services.Refused(f"Measurement #{old.pk} is {old.shown_status.lower()}; only a failed or "
                                   "interrupted measurement is measured again.")
        if old.trial.study.is_locked:
            raise services.Refused(f"Study {old.trial.study.code} has locked outcomes; nothing more is measured.")
        if old.status != ImageMeasurement.Status.FAILED:
            old.status = ImageMeasurement.Status.INTERRUPTED
            services._save(old, user, "Marked interrupted: its worker stopped reporting")
        now = timezone.now()
        new = ImageMeasurement(trial=old.trial, source=old.source, files=old.files, sha256=old.sha256,
                               settings=old.settings, threshold=old.threshold, window_s=old.window_s,
                               frames_total=old.frames_total, status=ImageMeasurement.Status.QUEUED, worker=WORKER,
                               heartbeat_at=now, requested_by=user, requested_at=now)
        services._save(new, user, f"Measured again (after #{old.pk})")
        transaction.on_commit(lambda: executor().submit(run_in_background, new.pk))
    return new


def void(*, user, measurement: ImageMeasurement, reason: str) -> ImageMeasurement:
    services.require_study_owner(user, measurement.trial.study, "void measurements")
    if measurement.trial.study.is_locked:
        raise services.Refused(f"Study {measurement.trial.study.code} has locked outcomes; measurements stay.")
    try:
        with transaction.atomic():
            measurement.void(user=user, reason=reason)
    except ValueError as error:
        raise services.Refused(str(error)) from None
    return measurement


# ---------------------------------------------------------------------------------------------
# The proposal on the scoring form, and the scorer's decision
# ---------------------------------------------------------------------------------------------
def latest_done(trial: Trial) -> ImageMeasurement | None:
    """One query."""
    return (ImageMeasurement.objects.done().filter(trial=trial).order_by("-finished_at", "-pk").first())


def proposal_initial(m: ImageMeasurement) -> dict:
    """Form values from a measurement: the dispersal (or censored) and the cluster table."""
    from .forms import clusters_text

    points = imaging.proposed_clusters(m.frames, dispersal_time_s=m.dispersal_time_s, window_s=m.window_s)
    return {"censored": bool(m.censored), "disperse_s": m.proposed_disperse_s(), "clusters_text": clusters_text(points)}


def matches(m: ImageMeasurement, disperse_s: float | None, censored: bool) -> bool:
    if bool(censored) != bool(m.censored):
        return False
    return bool(censored) or (disperse_s is not None and m.dispersal_time_s is not None
                              and abs(disperse_s - m.dispersal_time_s) < SAME_SCORE_S)


def score(*, user, trial: Trial, values: dict, reason: str = "", measurement: ImageMeasurement | None = None) -> Trial:
    """services.score_trial, and when a measurement's proposal was shown, whether the scorer kept it (one transaction)."""
    if measurement is None:
        return services.score_trial(user=user, trial=trial, values=values, reason=reason)
    if measurement.trial_id != trial.pk or measurement.status != ImageMeasurement.Status.DONE or measurement.is_voided:
        raise PermissionDenied("That measurement is not a finished measurement of this trial.")
    accepted = matches(measurement, values.get("disperse_s"), values.get("censored", False))
    if accepted:
        note = f"proposed by image measurement #{measurement.pk}, accepted"
    else:
        note = f"image measurement #{measurement.pk} proposed {_said(measurement.dispersed, measurement.proposed_disperse_s())}; overridden"
    with transaction.atomic():
        trial = services.score_trial(user=user, trial=trial, values=values, reason=reason, source_note=note)
        m = ImageMeasurement.objects.select_for_update().get(pk=measurement.pk)
        m.decision = ImageMeasurement.Decision.ACCEPTED if accepted else ImageMeasurement.Decision.OVERRIDDEN
        m.decided_by, m.decided_at = user, timezone.now()
        m.scored_disperse_s, m.scored_censored = trial.disperse_s, trial.censored
        services._save(m, user, f"Scorer {'accepted' if accepted else 'overrode'} the proposal")
    return trial


def _said(dispersed: bool | None, t: float | None) -> str:
    return f"dispersal at {t:g} s" if dispersed else "still clumped (censored)"


# ---------------------------------------------------------------------------------------------
# Study agreement: image-derived against human-scored dispersal
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class AgreementRow:
    label: str
    n_pairs: int
    n_both_dispersed: int
    n_censored_any: int  # pairs left out of Bland-Altman: censored by one or both
    bland_altman: agreement.BlandAltman | None
    kappa: agreement.Kappa | None


@dataclass(frozen=True)
class StudyAgreement:
    rows: list[AgreementRow]
    n_accepted: int  # human scores that are the accepted proposal: they agree by construction
    n_measured: int  # trials with a finished measurement


def _row(label: str, pairs: list[tuple[Trial, ImageMeasurement]]) -> AgreementRow:
    both = [(t, m) for t, m in pairs if not t.censored and not m.censored]
    ba = agreement.bland_altman([m.dispersal_time_s for _t, m in both], [t.disperse_s for t, _m in both])
    kappa = agreement.cohens_kappa([not m.censored for _t, m in pairs], [not t.censored for t, _m in pairs])
    return AgreementRow(label=label, n_pairs=len(pairs), n_both_dispersed=len(both),
                        n_censored_any=len(pairs) - len(both), bland_altman=ba, kappa=kappa)


def study_agreement(study, trials: list[Trial]) -> StudyAgreement | None:
    """Pooled agreement over the study's analysable trials with a finished measurement (one query).

    Each trial's latest finished measurement is paired with its current score. Bland-Altman on
    (image − scorer) dispersal times of the pairs dispersed by both; pairs censored by either are
    left out of it and counted. Cohen's κ on 'dispersed within the window' over every pair.
    """
    latest: dict[int, ImageMeasurement] = {}
    for m in (ImageMeasurement.objects.done().filter(trial__study=study)
              .only("pk", "trial_id", "dispersal_time_s", "censored", "decision", "finished_at", "window_s")
              .order_by("trial_id", "finished_at", "pk")):
        latest[m.trial_id] = m
    if not latest:
        return None
    pairs = [(t, latest[t.pk]) for t in trials
             if t.pk in latest and not t.is_voided and not t.is_excluded and t.is_scored]
    accepted = [(t, m) for t, m in pairs
                if m.decision == ImageMeasurement.Decision.ACCEPTED and matches(m, t.disperse_s, t.censored)]
    independent = [(t, m) for t, m in pairs if (t, m) not in accepted]
    rows = [_row("All pairs", pairs)]
    if accepted:
        rows.append(_row("Scores not taken from the proposal", independent))
    return StudyAgreement(rows=rows, n_accepted=len(accepted), n_measured=len(latest))
