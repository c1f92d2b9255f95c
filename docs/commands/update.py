"""Regenerate the command pages in this folder from the real `--help` of every calib command.

    python docs/commands/update.py

tests/test_docs.py fails when a page no longer matches `--help`; run this after changing an option.
"""

from pathlib import Path

from calib.cli import write_command_pages

if __name__ == "__main__":
    for path in write_command_pages(Path(__file__).resolve().parent):
        print(f"wrote {path}")
