"""The README's command examples, run from the README itself on the shipped sample.

Every line of a ```bash block that calls ``lineshift`` (alone or after ``&&`` in the install line)
is run through ``lineshift.cli.main`` in a scratch directory holding the shipped ``sample_spectra``
and ``line_lists``; a line marked ``# not run`` (data the user brings) is skipped.  Each must exit 0.
The orbit figures printed in the README must be the ones the series example prints.
"""

from __future__ import annotations

import os
import re
import shlex

import pytest

from lineshift.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
README = os.path.join(ROOT, "README.md")


def readme_commands(text: str) -> list[list[str]]:
    """The ``lineshift`` command lines of the README's bash blocks, as argument lists (program name dropped)."""
    commands = []
    for block in re.findall(r"```bash\n(.*?)```", text, flags=re.S):
        for line in block.replace("\\\n", " ").splitlines():
            if "# not run" in line:
                continue
            for part in line.split("&&"):
                words = shlex.split(part, comments=True)
                if words and os.path.basename(words[0]) == "lineshift":
                    commands.append(words[1:])
    return commands


def test_the_readme_has_runnable_examples_of_every_command():
    with open(README) as fh:
        commands = readme_commands(fh.read())
    assert {c[0] for c in commands} >= {"measure", "mask", "series", "simulate", "wavecheck"}


def test_the_readme_examples_run_and_print_what_the_readme_shows(tmp_path, monkeypatch, capfd):
    with open(README) as fh:
        text = fh.read()
    for name in ("sample_spectra", "line_lists"):
        os.symlink(os.path.join(ROOT, name), tmp_path / name)
    monkeypatch.chdir(tmp_path)
    printed = {}
    for argv in readme_commands(text):
        # globs as the shell would leave them when unquoted: lineshift expands them itself
        code = main(argv)
        err = capfd.readouterr().err
        assert code == 0, (argv, err)
        printed[argv[0]] = printed.get(argv[0], "") + err
    shown = re.search(r"gives, for the invented\ncompanion of Vessa-9.*?```\n(.*?)```", text, flags=re.S)
    assert shown, "the README no longer shows the sample's orbit"
    for line in shown.group(1).strip().splitlines():
        assert line in printed["series"], f"README shows {line!r}; the run printed:\n{printed['series']}"
    assert os.path.isfile(tmp_path / "demo_output" / "plots" / "rv_time.png")
    assert os.path.isfile(tmp_path / "demo_output" / "drift.csv")


@pytest.mark.parametrize("doc", ["README.md", "docs/reference.md"])
def test_the_docs_link_the_reference_not_the_outside_contract(doc):
    with open(os.path.join(ROOT, doc)) as fh:
        text = fh.read()
    assert "shared/interface.md" not in text
    if doc == "README.md":
        assert "(docs/reference.md)" in text
