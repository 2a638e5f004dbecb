"""The exit-code table has one source (bigsmooth/errors.py); the README, jobs/nightly.sh and the
CLI's --help carry copies generated from it, checked here so that they cannot drift."""

import os
import re

from bigsmooth import errors
from bigsmooth.cli import EPILOG
from helpers import ROOT


def _block(path, start, end):
    text = open(os.path.join(ROOT, path), encoding="utf-8").read()
    m = re.search(re.escape(start) + r"[^\n]*\n(.*?)\n" + re.escape(end), text, re.S)
    assert m, f"{path} lacks the generated exit-code block"
    return m.group(1)


def test_readme_exit_codes_are_generated_from_errors():
    assert _block("README.md", "<!-- exit-codes:start", "<!-- exit-codes:end -->") == errors.markdown_table()


def test_nightly_script_exit_codes_are_generated_from_errors():
    assert _block("jobs/nightly.sh", "# exit-codes:start", "# exit-codes:end") == errors.shell_comment()


def test_help_lists_every_exit_code():
    for code, meaning in errors.EXIT_CODES.items():
        assert f"{code:>3}  {meaning}" in EPILOG
