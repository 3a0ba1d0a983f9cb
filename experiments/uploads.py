"""An upload handler that stops reading a file once it passes settings.ATTACHMENT_MAX_BYTES.

It sits first in FILE_UPLOAD_HANDLERS and counts the bytes as they stream in; past the limit it
skips the file (Django discards the rest of that part and closes what the other handlers had
stored), so an oversized upload never lands whole on disk or in memory. The view reads
`request.upload_refusals` to tell the user which field was refused and why.
"""
from django.conf import settings
from django.core.files.uploadhandler import FileUploadHandler, SkipFile


def limit_bytes() -> int:
    return settings.ATTACHMENT_MAX_BYTES


def limit_text() -> str:
    return f"{limit_bytes() / 1e6:g} MB"


class SizeLimitUploadHandler(FileUploadHandler):
    def new_file(self, field_name, file_name, *args, **kwargs):
        super().new_file(field_name, file_name, *args, **kwargs)
        self.received = 0

    def receive_data_chunk(self, raw_data, start):
        self.received += len(raw_data)
        if self.received > limit_bytes():
            refusals = getattr(self.request, "upload_refusals", None)
            if refusals is None:
                refusals = self.request.upload_refusals = {}
            refusals[self.field_name] = (f"File '{self.file_name}' is larger than the limit of {limit_text()}; "
                                         "nothing was stored.")
            raise SkipFile()
        return raw_data  # passed on to the next handler, which stores it

    def file_complete(self, file_size):
        return None  # the next handler returns the file
