"""Test-wide setup: this folder's helper modules (``headless_chromium``) are importable.

Tests are imported in pytest's default prepend mode, which puts the folder of this file
on ``sys.path`` when it loads it.
"""
