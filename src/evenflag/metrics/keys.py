"""Group values inside metric keys (``flag_rate/<group>``), one-to-one.

MLflow keys allow only letters, digits, ``_ - . space / :``, and the report
splits ``<key>/<group>.ci_low`` at ``/`` and ``.``. A group value is written
into a key with every other character (``.``, ``/``, ``|``, ``:`` included)
escaped as ``:xx`` (two hex digits) or ``:u`` plus six hex digits beyond
U+00FF, so ``x|y`` and ``x-y`` stay two keys and the report can print the
value back. Letters of any script, digits, ``_``, ``-`` and space stay as
they are.
"""

from __future__ import annotations

import re


def _plain(char: str) -> bool:
    return char.isalnum() or char in "_- "


def group_key(value: str) -> str:
    """The group value as it appears in a metric key.

    >>> group_key("Female|Black"), group_key("x-y"), group_key("U.S."), group_key("a:b")
    ('Female:7cBlack', 'x-y', 'U:2eS:2e', 'a:3ab')
    """
    out = []
    for char in str(value):
        if _plain(char):
            out.append(char)
        elif ord(char) < 0x100:
            out.append(f":{ord(char):02x}")
        else:
            out.append(f":u{ord(char):06x}")
    return "".join(out)


_ESCAPE = re.compile(r":u([0-9a-f]{6})|:([0-9a-f]{2})")


def group_from_key(text: str) -> str:
    """The group value back from its key form (inverse of :func:`group_key`).

    >>> group_from_key(group_key("Female|Black")) == "Female|Black"
    True
    """
    return _ESCAPE.sub(lambda m: chr(int(m.group(1) or m.group(2), 16)), text)
