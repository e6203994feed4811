"""MkDocs hook: drop Sphinx cross-reference roles that numpydoc docstrings carry.

Docstrings in leanset name other objects as ``:class:`RowFrame```, ``:func:`check_input``` and the
like. mkdocstrings renders docstrings as Markdown, where the role would show as literal text before
the code span; this hook removes it, leaving the name as code.
"""

from __future__ import annotations

import re

_ROLE = re.compile(r":(?:py:)?(?:class|meth|func|mod|data|attr|obj|exc):(?=<code>)")


def on_page_content(html: str, page, config, files) -> str:
    return _ROLE.sub("", html)
