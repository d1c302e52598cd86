"""Text that comes from a kernel or a file, made safe to write: one cleaning step shared by every writer.

A kernel's name, its exception texts and any string of a results, baseline or peers
file may hold characters that mean something to the place they are written to:
control characters (terminal escape sequences, NUL, a carriage return that
overwrites a log line), bidirectional overrides that show text in another order
than it is stored (Unicode Technical Standard #39 and the "Trojan Source" report,
CVE-2021-42574), and lone surrogates, which are valid in a JSON string escape
(RFC 8259 §8.2) but cannot be encoded as UTF-8.

``clean`` replaces lone surrogates (done once, where documents are read);
``visible`` also shows the other characters as escapes (``\\x1b``, ``\\u202e``),
so every writer (terminal, HTML, Markdown, JUnit XML) prints what is there, and
nothing acts on its reader. Each writer adds its own markup escaping on top.
"""

from __future__ import annotations

import re

__all__ = ["clean", "visible", "REPLACEMENT"]

#: What a lone surrogate becomes (U+FFFD REPLACEMENT CHARACTER, Unicode §23.8).
REPLACEMENT = "\ufffd"

_SURROGATE = re.compile("[\ud800-\udfff]")

# C0 controls but tab and newline, DEL, C1 controls (Unicode general category Cc), the bidirectional
# embeddings, overrides and isolates (U+202A-U+202E, U+2066-U+2069), the line and paragraph separators
# (which some terminals and JSON-in-JS readers treat as line breaks), byte-order marks and the
# noncharacters U+FFFE/U+FFFF (not allowed in XML 1.0, §2.2), and lone surrogates.
_HIDDEN = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069\u2028\u2029\ufeff\ufffe\uffff"
                     "\ud800-\udfff]")


def _escape(m: re.Match) -> str:
    o = ord(m.group())
    return f"\\x{o:02x}" if o < 0x100 else f"\\u{o:04x}"


def clean(text: str) -> str:
    """``text`` with each lone surrogate replaced by U+FFFD, so that it encodes as UTF-8."""
    return _SURROGATE.sub(REPLACEMENT, text) if _SURROGATE.search(text) else text


def visible(value: object) -> str:
    """``str(value)`` with control characters, bidirectional controls and lone surrogates shown as
    ``\\xNN`` / ``\\uNNNN`` escapes; tab and newline are kept."""
    text = value if isinstance(value, str) else str(value)
    return _HIDDEN.sub(_escape, text)
