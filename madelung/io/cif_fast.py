"""The fast CIF tag reader: gemmi's parser, for files laid out plainly enough that it reads them exactly as
the general reader (:func:`ase.io.cif.parse_cif`) does.

The general tag parser reads a CIF line by line in Python (about 2-3 ms for a file of 200 lines);
gemmi's C++ parser reads the same file in about 0.05 ms. The two do not read every file alike:
the general parser works by lines (a loop row must end at a line end, a one-column loop takes the
whole line as its value, a blank line ends a loop, ``' #'`` cuts a loop line, text after a single
value stays in the value, TeX-like escapes and ``~``/``^`` sub- and superscripts are translated),
while gemmi reads a stream of tokens by the CIF 1.1 grammar. So a file is read here only when a
quick scan of its lines (:func:`plain_layout`) finds none of the constructs where the two could
differ, and the blocks, tags and loop lengths gemmi finds match the scan; anything else returns
None and is read by the general parser, which also gives every error message for a malformed
file. Values are converted as the general parser converts them (quotes dropped, integers, floats,
uncertainties in parentheses dropped), on first use.

The blocks returned are read-only mappings of tag to value like the general parser's blocks
(:class:`ase.io.cif.CIFBlock`), so everything downstream (:func:`madelung.io.cif.block_sites`) is
the same code for both readers; a block that lists no symmetry operators takes its space group
from ASE's tables by name or number, as the general reader's blocks do. ASE's CIF module is
imported only then, or when the general reader runs: importing any ``ase.io`` module runs
``ase.io/__init__``, which loads ASE's trajectories, constraints and space groups and with them
``scipy.integrate`` (about 0.2 s), which a plain file needs none of. Only gemmi's parser is used, not its symmetry expansion: that keeps rows which share a
position as separate sites (wüstite's Fe2+ and Fe3+ rows give 12 sites there, 8 here; the
manganite's La/Sr and Mn3+/Mn4+ rows 7 there, 5 here), while :mod:`madelung.io.cif` gathers them
into one mixed site.

References
----------
S. R. Hall, F. H. Allen and I. D. Brown, Acta Cryst. A47 (1991) 655 (the CIF format).
M. Wojdyr, J. Open Source Softw. 7 (2022) 4200 (GEMMI: a library for structural biology; its CIF parser).
"""

from __future__ import annotations

import re
from collections.abc import Mapping


#: Characters the general parser rewrites (HTML entities, TeX-like escapes, tags, sub/superscripts,
#: ``--``, ``+-`` and ``-+`` as dashes and plus-minus signs); a file holding any of them takes the general reader.
_REWRITTEN = re.compile(r"[&\\<~^]|--|\+-|-\+")

#: A line of whole tokens: bare words without quotes, or quoted strings without inner quotes.
_QUOTED_LINE = re.compile(r"""(?:(?:'[^']*'|"[^"]*"|[^\s'"]+)(?:\s+|$))*""")
_TOKEN = re.compile(r"""'[^']*'|"[^"]*"|[^\s'"]+""")
_INTEGER = re.compile(r"[+-]?\d+$")
_DECIMAL = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?$")
_QUOTED = re.compile(r"(\".*\")|('.*')$")
_UNCERTAIN = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?\(\d+\)?$")


def _tokens(line):
    """The tokens of a stripped line, or None when quotes make the two readers' splitting uncertain."""
    if "'" not in line and '"' not in line:
        return line.split()
    if _QUOTED_LINE.fullmatch(line) is None:
        return None
    return _TOKEN.findall(line)


def plain_layout(text):
    """The blocks of ``text`` as the general parser would read them, ``[(name, {tag: count})]`` with
    ``count`` the number of values of each (lower-case) tag, or None when the file holds a construct
    where the general parser and gemmi could read it differently (see the module docstring)."""
    if "#\\#CIF_2" in text:
        return None
    flagged = set()             # lines holding text the general parser rewrites: refused unless comments
    for count, match in enumerate(_REWRITTEN.finditer(text)):
        if count >= 64:
            return None
        flagged.add(text.count("\n", 0, match.start()))
    lines = text.split("\n")
    blocks = []
    tags = None
    state = "top"               # top, headers, rows, value (after a lone tag), text
    loop = []                   # the tags of the loop being read
    rows = 0
    pending = None              # a tag waiting for its value on a later line
    text_owner = None
    for number, raw in enumerate(lines):
        if not raw:
            continue                                # the general parser drops empty lines before reading
        if number in flagged and (state == "text" or raw.lstrip()[:1] != "#"):
            return None                             # text the general parser rewrites (comments aside)
        if state == "text":
            if raw[:1] == ";":
                if raw.rstrip() != ";":
                    return None                     # text after the closing ';'
                if text_owner is None:
                    return None
                tags[text_owner] = 1
                state, text_owner = "top", None
            elif raw.lstrip()[:1] == ";":
                return None                         # the general parser would end the text here
            continue
        line = raw.strip()
        if not line:
            if state == "rows":
                if rows == 0:
                    return None
                for tag in loop:
                    tags[tag] = rows
                state = "top"
            elif state == "headers":
                return None
            continue
        if line[0] == "#":
            continue
        if "#" in line:
            return None                             # a comment after values: the readers cut it differently
        lower = line.lower()
        if state == "value":
            if line[0] == ";":
                if raw[0] != ";":
                    return None
                state, text_owner = "text", pending
                continue
            if line[0] == "_" or lower.startswith(("data_", "loop_", "save_", "global_")):
                return None
            found = _tokens(line)
            if found is None or len(found) != 1:
                return None
            tags[pending] = 1
            state, pending = "top", None
            continue
        if state == "headers":
            if line[0] == "_":
                if len(line.split()) != 1:
                    return None
                if line.lower() in tags or line.lower() in loop:
                    return None
                loop.append(line.lower())
                continue
            state, rows = "rows", 0
        if state == "rows":
            if line[0] == "_" or lower.startswith(("data_", "loop_")):
                if rows == 0:
                    return None
                for tag in loop:
                    tags[tag] = rows
                state = "top"
            else:
                if line[0] == ";":
                    return None
                found = _tokens(line)
                if found is None or len(found) != len(loop):
                    return None
                rows += 1
                continue
        # state == "top"
        if lower.startswith("data_"):
            if len(line.split()) != 1 or len(line) == 5:
                return None
            tags = {}
            blocks.append((line[5:], tags))
            continue
        if tags is None:
            return None                             # something before the first data_ line
        if lower == "loop_":
            state, loop, rows = "headers", [], 0
            continue
        if line[0] != "_":
            return None                             # save frames, stray values, text fields out of place
        parts = line.split(None, 1)
        tag = parts[0].lower()
        if tag in tags:
            return None                             # a tag given twice
        if len(parts) == 1:
            state, pending = "value", tag
            continue
        found = _tokens(parts[1])
        if found is None or len(found) != 1:
            return None
        tags[tag] = 1
    if state == "rows" and rows > 0:
        for tag in loop:
            tags[tag] = rows
    elif state != "top":
        return None
    return blocks


def _value(raw):
    """A raw CIF token as the general parser gives it (see :func:`_converted`)."""
    if raw[:1] in ("'", '"') and len(raw) >= 2 and raw[-1] == raw[0]:
        return raw[1:-1]
    if raw[:1] == ";":
        return _text_field(raw)
    if _INTEGER.match(raw):
        return int(raw)
    if _DECIMAL.match(raw):
        return float(raw)
    if "(" not in raw:
        return raw      # a word: the general parser keeps it as it is
    return _converted(raw)


def _text_field(raw):
    """A ``;``-delimited text field as the general parser joins it: its lines stripped, empty lines
    dropped, then converted like any value."""
    lines = raw[1:].split("\n")[:-1]          # the last line is the closing ';'
    kept = [lines[0].strip()] + [line.strip() for line in lines[1:] if line]
    return _converted("\n".join(kept).strip())


def _converted(value):
    """A value as the general parser converts it (:func:`ase.io.cif.convert_value`): quotes
    dropped, integers, floats, a number's uncertainty in parentheses dropped (also when the closing
    parenthesis is missing), anything else kept. Its sub- and superscript rewriting (``~``, ``^``)
    is left out: a file holding those characters never reaches this reader (see ``_REWRITTEN``)."""
    value = value.strip()
    if _QUOTED.match(value):
        return value[1:-1]
    if _INTEGER.match(value):
        return int(value)
    if _DECIMAL.match(value):
        return float(value)
    if _UNCERTAIN.match(value):
        return float(value[:value.index("(")])
    return value


class _Tags(Mapping):
    """The tags of one block: raw gemmi tokens, converted on first use."""

    __slots__ = ("_raw", "_done")

    def __init__(self, raw):
        self._raw = raw         # tag -> raw token (single value) or list of raw tokens (loop)
        self._done = {}

    def __getitem__(self, key):
        try:
            return self._done[key]
        except KeyError:
            pass
        raw = self._raw[key]
        value = [_value(x) for x in raw] if isinstance(raw, list) else _value(raw)
        self._done[key] = value
        return value

    def __contains__(self, key):
        return key in self._raw

    def __iter__(self):
        return iter(self._raw)

    def __len__(self):
        return len(self._raw)


class FastBlock(Mapping):
    """One data block read by gemmi: its name and a read-only mapping of lower-case tag to value
    (a number, a string, or a list of them for a loop column), as the general parser's blocks."""

    __slots__ = ("name", "_tags")

    def __init__(self, name, tags):
        self.name = name
        self._tags = tags

    def __getitem__(self, key):
        return self._tags[key]

    def __iter__(self):
        return iter(self._tags)

    def __len__(self):
        return len(self._tags)

    def __repr__(self):
        return f"FastBlock({self.name!r}, {len(self._tags)} tags)"

    def get_spacegroup(self, subtrans_included):
        """The space group named or numbered in the block, from ASE's tables (only for a block that
        lists no symmetry operators; ASE's CIF module is imported here, see the module docstring)."""
        from ase.io.cif import CIFBlock
        return CIFBlock(self.name, self._tags).get_spacegroup(subtrans_included)


def fast_blocks(text):
    """Every data block of a CIF ``text`` as ``[FastBlock, ...]`` read by gemmi, or None when the file
    must take the general parser (no gemmi, a layout the two could read differently, or a file
    gemmi refuses)."""
    try:
        import gemmi    # on first use: loading its extension takes tens of ms that commands reading no CIF need not pay
    except ImportError:  # pragma: no cover - gemmi is a dependency; without it every CIF takes the general reader
        return None
    text = text.replace("\r", "").replace("\t", " ")     # as the general parser does first
    layout = plain_layout(text)
    if not layout:
        return None
    try:
        document = gemmi.cif.read_string(text)
    except Exception:   # gemmi refuses the file: the general parser gives the message
        return None
    if len(document) != len(layout):
        return None
    blocks = []
    for block, (name, counts) in zip(document, layout):
        if block.name != name:
            return None
        raw = {}
        for item in block:
            pair, loop = item.pair, item.loop
            if pair is not None:
                raw[pair[0].lower()] = pair[1]
            elif loop is not None:
                width, values = loop.width(), list(loop.values)
                for k, tag in enumerate(loop.tags):
                    raw[tag.lower()] = values[k::width]
            else:
                return None     # a save frame
        if len(raw) != len(counts):
            return None
        for tag, count in counts.items():
            value = raw.get(tag)
            if value is None or (len(value) if isinstance(value, list) else 1) != count:
                return None
        blocks.append(FastBlock(name, _Tags(raw)))
    return blocks
