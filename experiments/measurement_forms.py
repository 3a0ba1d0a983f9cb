"""The form that uploads dish photos or a video to be measured (experiments/imaging.py says how)."""
from django import forms

from colonies.forms import reason_field
from colonies.validators import NamedErrorsMixin

from . import filetypes, imaging, uploads
from .measuring import Options
from .models import ImageMeasurement

PHOTO_TYPES = filetypes.ALLOWED_BY_KIND["photo"]
VIDEO_TYPES = filetypes.ALLOWED_BY_KIND["video"]


class MultipleFileInput(forms.ClearableFileInput):
    allow_multiple_selected = True


class MultipleFileField(forms.FileField):
    """Several files in one field (Django's documented pattern); cleans to a list."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("widget", MultipleFileInput(attrs={"accept": "image/png,image/jpeg,image/tiff,video/mp4,"
                                                                        "video/quicktime,video/x-msvideo"}))
        super().__init__(*args, **kwargs)

    def clean(self, data, initial=None):
        single = super().clean
        if isinstance(data, (list, tuple)):
            if not data:
                return [single(None, initial)]
            return [single(item, initial) for item in data]
        return [single(data, initial)]


def _bounded(label: str, low: float, high: float, unit: str = "", **kwargs) -> forms.FloatField:
    text = f"{label}: %(value)s{(' ' + unit) if unit else ''} is not possible; allowed range {low:g}–{high:g}" \
           f"{(' ' + unit) if unit else ''}."
    return forms.FloatField(label=label, min_value=low, max_value=high,
                            error_messages={"min_value": text, "max_value": text}, **kwargs)


class MeasurementForm(NamedErrorsMixin, forms.Form):
    files = MultipleFileField(label="Photos or video", help_text="Several dish photos in time order (their names "
                              "sort in that order), or one video.")
    interval_s = _bounded("Seconds between frames", 0.04, 3600, "s", initial=30,
                          help_text="Photos: the time between two photos. Video: measure one frame every so many "
                                    "seconds.")
    stimulus_at_s = _bounded("Stimulus at", 0, 86400, "s", initial=0, required=False,
                             help_text="When the stimulus was applied, counted from the first photo or the start of "
                                       "the video. Frames before it are not measured.")
    threshold = _bounded("Dispersal threshold", 0.05, 0.95, initial=imaging.DEFAULT_THRESHOLD,
                         help_text="Dispersed once the largest cluster holds less than this fraction of all worm "
                                   "area, and stays so (a lab setting).")
    scale_px_per_mm = _bounded("Scale", 0.01, 10000, "px/mm", required=False,
                               help_text="Pixels per millimetre, to report areas in mm² (empty: pixels only).")
    polarity = forms.ChoiceField(label="Worms are", choices=[("dark", "darker than the dish"),
                                                             ("bright", "brighter than the dish")], initial="dark")
    dish_radius_fraction = _bounded(
        "Dish mask", 0.1, 1.5, required=False,
        help_text="Measure only inside a centred circle of this fraction of half the shorter side (e.g. 0.9 leaves "
                  "out a dark dish rim). Empty: the whole frame.")
    min_area_px = forms.IntegerField(
        label="Smallest worm area", min_value=1, max_value=1_000_000, initial=imaging.Segmentation.min_area_px,
        help_text="Pixels; smaller specks are ignored.",
        error_messages={"min_value": "Smallest worm area: %(value)s px is not possible; allowed range 1–1000000 px.",
                        "max_value": "Smallest worm area: %(value)s px is not possible; allowed range 1–1000000 px."})
    background_px = _bounded("Lighting correction scale", 2, 2000, "px", required=False,
                             initial=imaging.Segmentation.background_px,
                             help_text="Width over which uneven lighting is evened out; a few clump widths. Empty: "
                                       "no correction (evenly lit dishes only).")

    def clean_files(self):
        files = self.cleaned_data["files"]
        types = []
        for upload in files:
            if upload.size > uploads.limit_bytes():
                raise forms.ValidationError(f"File '{upload.name}' is {upload.size / 1e6:.1f} MB, above the limit of "
                                            f"{uploads.limit_text()}.")
            head = upload.read(filetypes.SNIFF_BYTES)
            upload.seek(0)
            kind = filetypes.sniff(head)
            if kind not in PHOTO_TYPES + VIDEO_TYPES:
                raise forms.ValidationError(
                    f"File '{upload.name}' is not a photo or a video that can be measured: allowed are "
                    f"{filetypes.allowed_text('photo')} photos, or one {filetypes.allowed_text('video')} video "
                    "(told by the file's content).")
            types.append(kind)
        videos = sum(1 for t in types if t in VIDEO_TYPES)
        if videos and len(files) > 1:
            raise forms.ValidationError(f"Photos or video: a video is measured on its own, not with {len(files) - 1} "
                                        "other file(s).")
        self.source = ImageMeasurement.Source.VIDEO if videos else ImageMeasurement.Source.PHOTOS
        return sorted(files, key=lambda u: u.name) if not videos else files

    def options(self) -> Options:
        d = self.cleaned_data
        segmentation = imaging.Segmentation(polarity=d["polarity"], min_area_px=d["min_area_px"],
                                            background_px=d.get("background_px"),
                                            dish_radius_fraction=d.get("dish_radius_fraction"))
        return Options(interval_s=d["interval_s"], stimulus_at_s=d.get("stimulus_at_s") or 0.0, threshold=d["threshold"],
                       scale_px_per_mm=d.get("scale_px_per_mm"), segmentation=segmentation)


class VoidMeasurementForm(NamedErrorsMixin, forms.Form):
    reason = reason_field(help_text="Required; kept in the history.",
                          error_messages={"required": "Reason: give a reason to void the measurement."})
