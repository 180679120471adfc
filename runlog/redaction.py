"""Removing credentials from any text before it is printed, logged, shown or written.

A catalogue URL may hold a password, and it travels into error messages, logs, JSON and
dashboard pages, also when it does not parse (``postgresql//user:PW@host/db``, an
unencoded ``@`` in the password). Parsing it to hide the password fails exactly then, so
:func:`scrub` works on text: in every word that looks like ``[scheme:][//]user:secret@host``
(the secret running to the word's *last* ``@``) the secret becomes ``***``, as do the
values of ``password=`` / ``passwd=`` / ``pwd=`` keywords (libpq connection strings, URL
queries). Secrets of the URLs runlog was given in this process (:func:`remember`) are
also replaced wherever they appear, which covers the shapes no pattern foresees (a
password with a space in it).
"""

from __future__ import annotations

import logging
import re
import threading

__all__ = ["scrub", "remember", "MASK", "ScrubbingFilter"]

MASK = "***"

# A word: what runs between blanks and quotes (a URL never holds them unencoded; commas,
# brackets and the like may be in a password, so they do not end a word).
_WORD = re.compile(r"[^\s'\"]+")
# The start of a URL: a scheme with ':' and slashes, or slashes without the ':' (a typo).
_HEAD = re.compile(r"(?:[A-Za-z][A-Za-z0-9+.\-]*:/*|[A-Za-z][A-Za-z0-9+.\-]*//+|//+)")
_KEYWORD = re.compile(r"(?i)\b(password|passwd|pwd|pgpassword)(\s*=\s*)('[^']*'|\"[^\"]*\"|[^\s&;,'\"]+)")

_known: set[str] = set()
_lock = threading.Lock()


def _secret_of(word: str) -> tuple[int, int] | None:
    """Where the password sits in one word (start, end), ``None`` when it has none."""
    at = word.rfind("@")
    if at < 0:
        return None
    begin = len(word) - len(word.lstrip("([{<"))
    head = _HEAD.match(word, begin)
    start = head.end() if head else begin
    colon = word.find(":", start, at)
    if colon < 0 and head is not None and "/" not in head.group():
        # 'user:secret@host' with no scheme: what looked like one was the user name.
        start, colon = begin, word.find(":", begin, at)
    if colon < 0 or "/" in word[start:colon]:  # 'path/a:b@c' is no user name
        return None
    return colon + 1, at


def remember(url: object) -> None:
    """Note the password of ``url`` (text or a SQLAlchemy URL), so that :func:`scrub`
    removes it from any text later, however the text came to hold it."""
    text = url.render_as_string(hide_password=False) if hasattr(url, "render_as_string") else str(url)
    found = []
    # The whole text is one URL here: a secret may hold blanks a word would end at.
    whole = _secret_of(text.strip())
    if whole is not None and whole[1] > whole[0]:
        found.append(text.strip()[whole[0] : whole[1]])
    for match in _WORD.finditer(text):
        place = _secret_of(match.group())
        if place is not None and place[1] > place[0]:
            found.append(match.group()[place[0] : place[1]])
    found += [m.group(3).strip("'\"") for m in _KEYWORD.finditer(text)]
    password = getattr(url, "password", None)
    if password:
        found.append(str(password))
    with _lock:
        _known.update(secret for secret in found if len(secret) >= 3 and secret != MASK)


def scrub(text: object) -> str:
    """``text`` with every credential it may hold replaced by ``***``."""
    text = str(text)
    with _lock:
        known = sorted(_known, key=len, reverse=True)
    for secret in known:
        text = text.replace(secret, MASK)
    text = _KEYWORD.sub(lambda m: m.group(1) + m.group(2) + MASK, text)

    def hide(match: re.Match) -> str:
        word = match.group()
        place = _secret_of(word)
        if place is None or place[1] == place[0]:
            return word
        return word[: place[0]] + MASK + word[place[1] :]

    return _WORD.sub(hide, text)


class ScrubbingFilter(logging.Filter):
    """A logging filter that scrubs every record's message (put it on a logger or handler)."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.msg = scrub(record.getMessage())
        record.args = None
        return True
