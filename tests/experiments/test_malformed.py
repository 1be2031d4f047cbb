"""Every file in malformed/ has one problem and must be refused with a one-line SpecError.

Each file starts with ``# expect: TEXT`` (text the message must contain: a field path or a word)
and, when the problem sits on a line of the file, ``# line: N`` (the line the message must give as
``FILE:N:``). The same corpus feeds the CLI test (exit code 2, one line on stderr).
"""

import re
import warnings
from pathlib import Path

import pytest

from propensim.experiments.spec import SpecError, load_spec

CORPUS = Path(__file__).parent / "malformed"
FILES = sorted(CORPUS.glob("*.toml"))


def header(path: Path) -> tuple[str, int | None]:
    text = path.read_text()
    expect = re.match(r"# expect: (.+)\n", text)
    assert expect, f"{path.name} must start with '# expect: ...'"
    line = re.search(r"^# line: (\d+)$", text, re.MULTILINE)
    return expect.group(1).strip(), int(line.group(1)) if line else None


def test_corpus_is_large_enough():
    assert len(FILES) >= 45
    assert len({header(p)[0] for p in FILES}) >= 40  # distinct problems, not one repeated


@pytest.mark.parametrize("path", FILES, ids=lambda p: p.stem)
def test_malformed_spec_is_refused_with_a_located_one_line_message(path):
    expect, line = header(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        with pytest.raises(SpecError) as info:
            load_spec(path)
    msg = str(info.value)
    assert "\n" not in msg and "\r" not in msg
    assert expect in msg
    assert msg.startswith(f"{path}:")
    assert info.value.file == str(path)
    if line is not None:
        assert msg.startswith(f"{path}:{line}: "), msg
        assert info.value.line == line


@pytest.mark.parametrize("path", FILES[:5], ids=lambda p: p.stem)
def test_malformed_spec_as_str_path(path):
    with pytest.raises(SpecError, match=re.escape(str(path))):
        load_spec(str(path))
