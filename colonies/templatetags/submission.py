"""`{% submission_key %}`: the one-time key every record-creating form carries (see colonies/idempotency.py)."""
import uuid

from django import template
from django.utils.html import format_html

from colonies.idempotency import SUBMISSION_FIELD

register = template.Library()


@register.simple_tag
def submission_key():
    """A hidden input with a fresh random key; each rendering of a form gets its own."""
    return format_html('<input type="hidden" name="{}" value="{}">', SUBMISSION_FIELD, uuid.uuid4())
