"""Every code block of README.md runs as written, on the bundled files.

The blocks run in README order in one temporary working directory that holds links to the
project's `structures/` and `tests/` folders, so the README's relative paths work and every file a
command writes lands in the temporary directory. Python blocks are executed; in `bash`/`sh` blocks
every command starting with `madelung` goes through `madelung.cli.main` in-process (shell globs and
braces expanded as a shell would), and in `console` blocks the same for the `$ madelung ...` lines
(the output shown is not compared). Blocks in `text`, `json` or `toml` are not run; one that the
README introduces with its file name in backticks (e.g. "the tensor (`eps.txt`):") is written to that
file first, because the commands read it. A block of any other language, or with none, fails the
test, so nothing is skipped silently.
"""

import glob
import os
import re
import shlex
from pathlib import Path

import pytest

from madelung.cli import main

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"

SHELL = {"bash", "sh", "console"}
NOT_RUN = {"text", "json", "toml"}
# Commands in shell blocks that are not the tool itself: installing it and running this suite.
OTHER_COMMANDS = {
    "python -m pip install -e .",
    "python -m pip install -e '.[test]'",
    "python -m pytest -q",
}


def readme_blocks():
    """(line number, language, text, the paragraph line just before the block)."""
    lines = README.read_text(encoding="utf-8").splitlines()
    blocks, i = [], 0
    while i < len(lines):
        if lines[i].startswith("```"):
            language, start = lines[i][3:].strip(), i
            j = i + 1
            while not lines[j].startswith("```"):
                j += 1
            before = next((lines[k] for k in range(start - 1, -1, -1) if lines[k].strip()), "")
            blocks.append((start + 1, language, "\n".join(lines[start + 1:j]), before))
            i = j + 1
        else:
            i += 1
    return blocks


BLOCKS = readme_blocks()
FILE_NAME = re.compile(r"`([\w.-]+\.\w+)`\)?:\s*$")


def _expand(token):
    """A shell word: quoted words stay as they are; others get brace and glob expansion."""
    if token[0] in "'\"":
        return shlex.split(token)
    match = re.search(r"\{([^{}]*,[^{}]*)\}", token)
    if match:
        return [word for part in match.group(1).split(",")
                for word in _expand(token[:match.start()] + part + token[match.end():])]
    if any(c in token for c in "*?["):
        found = sorted(glob.glob(token))
        assert found, f"README glob {token!r} matches no bundled file"
        return found
    return [token]


def shell_commands(language, text):
    """(words, expected exit code) of each command of a shell block, continuation lines joined.

    A command exits 0 unless the comment on its line says "exit code N".
    """
    if language == "console":
        lines, keep = [], False
        for line in text.splitlines():
            if line.startswith("$ "):
                lines.append(line[2:])
                keep = line.endswith("\\")
            elif keep:
                lines.append(line)
                keep = line.endswith("\\")
        text = "\n".join(lines)
    commands = []
    for line in text.replace("\\\n", " ").splitlines():
        lexer = shlex.shlex(line, posix=False)
        lexer.whitespace_split, lexer.commenters = True, "#"
        words = list(lexer)
        expected = re.search(r"#.*exit code (\d+)", line)
        while words:
            cut = words.index("&&") if "&&" in words else len(words)
            commands.append((words[:cut], int(expected.group(1)) if expected else 0))
            words = words[cut + 1:]
    return commands


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    work = tmp_path_factory.mktemp("readme")
    for name in ("structures", "tests"):
        (work / name).symlink_to(ROOT / name, target_is_directory=True)
    for _, language, text, before in BLOCKS:
        match = FILE_NAME.search(before)
        if language in NOT_RUN and match:
            (work / match.group(1)).write_text(text + "\n", encoding="utf-8")
    return work


def test_every_block_has_a_known_language():
    for line, language, _, _ in BLOCKS:
        assert language in SHELL | NOT_RUN | {"python"}, f"README.md:{line}: block language {language!r}"
    assert sum(language == "python" for _, language, _, _ in BLOCKS) >= 3
    assert sum(language in SHELL for _, language, _, _ in BLOCKS) >= 8


@pytest.mark.parametrize("line,language,text", [(b[0], b[1], b[2]) for b in BLOCKS if b[1] in SHELL | {"python"}],
                         ids=[f"line{b[0]}-{b[1]}" for b in BLOCKS if b[1] in SHELL | {"python"}])
def test_readme_block_runs(line, language, text, workdir, capsys):
    here = os.getcwd()
    os.chdir(workdir)
    try:
        if language == "python":
            exec(compile(text, f"README.md:{line}", "exec"), {"__name__": f"readme_line_{line}"})
            return
        for words, expected in shell_commands(language, text):
            if words[0] != "madelung":
                assert " ".join(words) in OTHER_COMMANDS, f"README.md:{line}: unexpected command {words}"
                continue
            argv = [arg for word in words[1:] for arg in _expand(word)]
            code = main(argv)
            captured = capsys.readouterr()
            assert code == expected, f"README.md:{line}: madelung {' '.join(argv)} exited {code}: {captured.err}"
            if expected == 2:
                # the README's exit-code-2 examples each have exactly one bad input on purpose
                assert "madelung: 1 of " in captured.err, f"README.md:{line}: {captured.err}"
    finally:
        os.chdir(here)
