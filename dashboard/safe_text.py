"""Data shown as text, never as markup: series ids, source names, messages, notes, paths.

Streamlit renders markdown in captions, headers, messages, metric labels and values, help
tooltips and page links: images (``![x](url)``, fetched by the viewer's browser), links, emoji
and icon codes (``:smile:``, ``:material/home:``), coloured text (``:red[...]``), TeX
(``$...$``) and bare addresses (``www.x.org``, ``http://...``, ``a@b.org``, made into links by
GitHub-flavoured markdown). :func:`plain` turns any text into markdown that shows exactly that
text:

- every ASCII punctuation character is backslash-escaped (CommonMark 0.31, section 2.4:
  "Any ASCII punctuation character may be backslash-escaped"), which stops images, links,
  emphasis, headings, lists, code, TeX and the ``:name[...]`` / ``:material/...:`` directives;
- a WORD JOINER (U+2060, invisible, zero width) follows every ``:`` and ``@`` and splits
  ``www.``, because Streamlit's emoji codes and GFM's bare-address links are found in the
  text after the escapes are applied (checked in a real browser in
  ``tests/test_dashboard_browser.py``);
- control characters (CR, LF, TAB, NUL, ...) are shown as their Unicode control pictures
  (U+2400 + code, e.g. LF as ``␊``), so an id cannot start a new markdown block.

Tables (``st.dataframe``) and select-box options show text as it is and need none of this;
downloads (CSV) always carry the original text.
"""

from __future__ import annotations

import re

#: Invisible, zero-width; splits a token without changing what the reader sees.
WORD_JOINER = "\u2060"

_PUNCT = re.compile(r"([!\"#$%&'()*+,\-./:;<=>?@\[\\\]^_`{|}~])")
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def _picture(m: re.Match) -> str:
    c = ord(m.group(0))
    return "\u2421" if c == 0x7F else chr(0x2400 + c)


def plain(text) -> str:
    """Markdown that displays ``text`` literally (see the module notes).

    >>> plain("kiosk-a/tea")
    'kiosk\\\\-a\\\\/tea'
    >>> plain("![x](http://e.example/p.png)").count("\\\\")   # every punctuation mark escaped
    11
    >>> plain("line1\\nline2")
    'line1␊line2'
    >>> plain(None)
    '—'
    """
    if text is None:
        return "—"
    s = _CONTROL.sub(_picture, str(text))
    s = _PUNCT.sub(r"\\\1", s)
    s = s.replace("\\:", "\\:" + WORD_JOINER).replace("\\@", "\\@" + WORD_JOINER)
    s = re.sub(r"(?i)(www)(\\\.)", lambda m: m.group(1) + WORD_JOINER + m.group(2), s)
    return s


def shown(markdown: str) -> str:
    """What a reader sees of :func:`plain`'s output: escapes and word joiners removed
    (control pictures stay). Used by the tests to compare with the original text.

    >>> shown(plain("a:b@c [d](e) www.f"))
    'a:b@c [d](e) www.f'
    """
    return re.sub(r"\\([!-/:-@\[-`{-~])", r"\1", markdown.replace(WORD_JOINER, ""))
