"""Reading YAML: libyaml's fast path against PyYAML's pure-Python loader.

Outside reference: PyYAML's own pure-Python loader (its scanner, parser, composer,
resolver and safe constructor), which read every file before the fast path and
still reads whatever the fast path declines.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from optfeed.errors import InputError
from optfeed.problem import yamlio

ROOT = Path(__file__).resolve().parents[1]
SHIPPED = sorted({p for pattern in ("configs/**/*.yaml", "tests/**/*.yaml", "docs/**/*.yaml")
                  for p in ROOT.glob(pattern)})


def _pure_python(path, text):
    """(data, lines) as the pure-Python loader reads ``text``, or the InputError message."""
    loader = yamlio._Loader(text)
    try:
        lines = yamlio.Lines()
        data = yamlio._build(loader.get_single_node(), (), path, lines, loader, yamlio._Seen())
        return data, lines._lines
    finally:
        loader.dispose()


def test_libyaml_is_there():
    """PyYAML's wheels bring libyaml (common practice): the fast path is used here."""
    assert yamlio.CParser is not None


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: str(p.relative_to(ROOT)))
def test_every_shipped_file_reads_as_the_pure_python_loader_reads_it(path):
    """Every YAML file of the project (problems, runs, sweeps, bad inputs): the fast
    path reads it, with the data and every key's line of the pure-Python loader; a
    file the pure-Python loader refuses is refused, with the same message where the
    fault lies in the node tree (a tag, a duplicate key, an alias bomb)."""
    text = path.read_text(encoding="utf-8", errors="replace")
    try:
        reference, refused = _pure_python(path, text), None
    except InputError as exc:  # a fault in the node tree: the same message either way
        refused = str(exc)
    except Exception:  # noqa: BLE001 - PyYAML's own complaint, which read_yaml words
        refused = "syntax"
    if refused is not None:
        with pytest.raises(InputError) as info:
            yamlio.read_yaml(path, text)
        assert refused == "syntax" or str(info.value) == refused
        return
    fast = yamlio._fast_read(path, text)
    assert fast is not None
    assert (fast[0], fast[1]._lines) == reference


@pytest.mark.parametrize("text, why", [
    ("a: 1\nb: [1, 2\n", "the '[' opened here is not closed"),
    ("a: 1\na: 2\n", "duplicate key"),
    ("a: !!python/object:os.system echo\n", "is not allowed"),
    ("a: 1\n\x07b: 2\n", "is not allowed in a YAML file"),
    ("a: " + "[" * 100 + "]" * 100 + "\n", "nested more than"),
    ("a: &x [*x]\n", "nested more than"),
    ("a: [!, 1]\n", "is not allowed"),
    ('a: "\\U00110000"\n', "YAML syntax error"),
])
def test_bad_documents_give_the_pure_python_loaders_message(tmp_path, text, why):
    """A broken document is declined by the fast path and named, with its line, as
    before (one message, the file and the line)."""
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        yamlio.read_yaml(path)
    assert why in str(info.value) and str(path) in str(info.value)


def test_a_tab_before_a_comment_is_read_as_yaml_allows():
    """YAML allows a tab as separating white space (YAML 1.2 spec, s-separate-in-line:
    spaces or tabs, from memory); libyaml reads it, where the pure-Python loader
    refused the line."""
    import yaml

    text = "a: 1\t# a note\nb: 2\n"
    with pytest.raises(yaml.YAMLError):
        yaml.load(text, Loader=yaml.SafeLoader)
    data, lines = yamlio.read_yaml("tab.yaml", text)
    assert data == {"a": 1, "b": 2} and lines.own(("b",)) == 2


@pytest.mark.parametrize("text, data", [
    ("a: !\n", {"a": None}),
    ("a: [1,\n\ufeff2]\n", {"a": [1, "\ufeff2"]}),
])
def test_documents_the_two_readers_would_read_apart_go_to_the_pure_python_loader(text, data):
    """A bare '!' tag on an empty value (libyaml: '', the pure-Python loader: null)
    and a byte order mark inside the text (libyaml skips it) are read as the
    pure-Python loader reads them."""
    assert yamlio._fast_read("x.yaml", text) is None
    assert yamlio.read_yaml("x.yaml", text)[0] == data == _pure_python("x.yaml", text)[0]
