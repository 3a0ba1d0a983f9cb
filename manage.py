#!/usr/bin/env python
"""Django's command-line utility for Vermilog."""
import os
import sys


def main():
    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "vermilog.settings")
    if sys.argv[1:2] == ["demo"]:
        # The demo is a development server on this machine: development mode unless told otherwise.
        os.environ.setdefault("DEBUG", "1")
    from django.core.management import execute_from_command_line

    execute_from_command_line(sys.argv)


if __name__ == "__main__":
    main()
