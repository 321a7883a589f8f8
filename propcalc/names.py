"""Names as people type them, and the nearest name for a typo.

``Gelu``, ``GELU``, ``leaky-relu``, ``Leaky ReLU`` and ``hardtanh`` all mean the built-in
``gelu``, ``leaky_relu`` or ``hard_tanh``: case does not matter, and the separators ``-``, ``_``
and spaces are interchangeable where the name has one (or may all be left out, as in
``LeakyReLU``); :func:`canonical_name` finds the name meant among a list of choices. For a name
that is not known, :func:`nearest_name` picks the closest choice (``difflib`` on the normalised
spellings), so every place that meets an unknown name (activations, their parameters, the CLI,
the service) says "did you mean gelu?" in the same way. Nothing here depends on what the
choices are.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable

__all__ = ["name_key", "canonical_name", "nearest_name", "did_you_mean"]

_SEPARATORS = re.compile(r"[-_\s]+")
_NAME_LIKE = re.compile(r"[A-Za-z0-9][A-Za-z0-9_\-\s]*")


def name_key(text: str) -> str:
    """The spelling-insensitive key of a name: lower case, separators removed."""
    return _SEPARATORS.sub("", text.strip().lower())


def _spelling(text: str) -> str:
    """Lower case with every run of separators turned into one underscore."""
    return _SEPARATORS.sub("_", text.strip().lower()).strip("_")


def canonical_name(text: str, choices: Iterable[str]) -> str | None:
    """The choice that ``text`` names, in whatever case and separators, else None.

    Parameters
    ----------
    text : str
        A name as typed: ``"Gelu"``, ``"leaky-relu"``, ``"Hard Tanh"``...
    choices : iterable of str
        The names that exist, spelled in lower case with ``_`` between words.

    Returns
    -------
    str or None
        The choice as spelled there, or None when ``text`` is not a name (it contains
        brackets or operators) or names none of the choices. Separators must sit where the
        choice has one, or be left out altogether: ``"s - elu"`` is not ``"selu"``.

    Examples
    --------
    >>> canonical_name("Leaky-ReLU", ["relu", "leaky_relu"])
    'leaky_relu'
    >>> canonical_name("x * tanh(x)", ["tanh"]) is None
    True
    """
    if not isinstance(text, str) or not _NAME_LIKE.fullmatch(text.strip()):
        return None
    spelled = _spelling(text)
    joined = "_" not in spelled  # "LeakyReLU", "hardtanh": no separator typed at all
    for name in choices:
        if spelled == name or (joined and spelled == name_key(name)):
            return name
    return None


def nearest_name(word: str, choices: Iterable[str], cutoff: float = 0.6) -> str | None:
    """The choice closest to ``word`` (a likely typo), or None when none is close.

    Case and separators are ignored: an exact match up to spelling wins; otherwise the best
    ``difflib`` match of the normalised spellings with a ratio of at least ``cutoff``.

    Parameters
    ----------
    word : str
        What was typed.
    choices : iterable of str
        The names that exist.
    cutoff : float
        Least similarity ratio (0 to 1) of a suggestion.

    Returns
    -------
    str or None
        One of ``choices``, as spelled there.

    Examples
    --------
    >>> nearest_name("gleu", ["elu", "gelu", "selu"])
    'gelu'
    """
    options = list(dict.fromkeys(choices))
    if not isinstance(word, str) or not options:
        return None
    key = name_key(word)
    for option in options:
        if name_key(option) == key:
            return option
    spelled: dict[str, str] = {}
    for option in options:
        spelled.setdefault(_spelling(option), option)
    close = difflib.get_close_matches(_spelling(word), list(spelled), n=1, cutoff=cutoff)
    return spelled[close[0]] if close else None


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """``" (did you mean gelu?)"`` for the nearest choice, or ``""`` when none is close."""
    close = nearest_name(word, choices)
    return f" (did you mean {close}?)" if close is not None else ""
