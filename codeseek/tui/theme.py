"""The colours of the UI: codeseek's own palette, as two textual themes and two code styles.

One palette per background (``DARK_PALETTE``, ``LIGHT_PALETTE``) names every
colour once. From it come the textual theme (``app.tcss`` and the rendered
text refer to its names, ``$primary``, ``$cs-place``, ..., never to colour
codes) and the reader's syntax style: :data:`CODE_TOKENS` says which palette
colour and which attributes each kind of token gets, and :func:`code_style`
turns that into a pygments ``Style`` class. Every code colour is the palette's,
chosen to read at 4.5:1 or more against its own background.

The dark theme is the default; the light one is used when the terminal says
its background is light (``COLORFGBG`` ending in 7 or 15). Without colour
(``NO_COLOR``) the reader keeps only bold and italic (:func:`code_look`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from pygments.style import Style  # type: ignore[import-untyped]
from pygments.token import (  # type: ignore[import-untyped]
    Comment,
    Error,
    Generic,
    Keyword,
    Name,
    Number,
    Operator,
    Punctuation,
    String,
    Token,
    _TokenType,
)
from rich.style import Style as RichStyle
from rich.syntax import ANSISyntaxTheme, PygmentsSyntaxTheme, SyntaxTheme
from textual.theme import Theme

DARK_PALETTE: dict[str, str] = {
    "background": "#10171d",
    "surface": "#162028",
    "panel": "#1f2c35",
    "foreground": "#d8e1e6",
    "bright": "#f0f4f6",
    "teal": "#3fb8a8",
    "amber": "#e0a84f",
    "coral": "#e07a5f",
    "red": "#e05f5f",
    "green": "#7bc47f",
    "sky": "#8fc7e0",
    "slate": "#a9bac3",
    "grey": "#7f939e",
    "cursor": "#25505a",
    "cursor-blurred": "#1f3640",
}
"""The palette on a dark background."""

LIGHT_PALETTE: dict[str, str] = {
    "background": "#f6f8f7",
    "surface": "#e9eeee",
    "panel": "#dbe4e6",
    "foreground": "#1d2a31",
    "bright": "#0b1318",
    "teal": "#0f6e63",
    "amber": "#8a5a00",
    "coral": "#a8432a",
    "red": "#b3261e",
    "green": "#2f6b33",
    "sky": "#1f5f80",
    "slate": "#44555e",
    "grey": "#56656d",
    "cursor": "#b9dcd6",
    "cursor-blurred": "#d3e6e3",
}
"""The palette on a light background: the same hues, darker."""

CODE_TOKENS: dict[_TokenType, tuple[str, str]] = {
    Token: ("foreground", ""),
    Comment: ("grey", "italic"),
    Comment.Preproc: ("amber", ""),
    Keyword: ("teal", "bold"),
    Keyword.Constant: ("coral", "bold"),
    Keyword.Type: ("sky", ""),
    Name: ("foreground", ""),
    Name.Builtin: ("sky", ""),
    Name.Builtin.Pseudo: ("coral", "italic"),
    Name.Class: ("amber", "bold"),
    Name.Function: ("amber", ""),
    Name.Decorator: ("sky", "italic"),
    Name.Exception: ("coral", ""),
    Name.Namespace: ("sky", ""),
    Name.Tag: ("teal", ""),
    Name.Attribute: ("slate", ""),
    String: ("green", ""),
    String.Doc: ("green", "italic"),
    String.Escape: ("coral", ""),
    String.Interpol: ("coral", ""),
    Number: ("coral", ""),
    Operator: ("slate", ""),
    Operator.Word: ("teal", "bold"),
    Punctuation: ("slate", ""),
    Generic.Deleted: ("red", ""),
    Generic.Inserted: ("green", ""),
    Generic.Heading: ("bright", "bold"),
    Error: ("red", "underline"),
}
"""Which palette colour and attributes each kind of token gets."""


def _styles(palette: Mapping[str, str]) -> dict[_TokenType, str]:
    return {token: " ".join(part for part in (attributes, palette[colour]) if part)
            for token, (colour, attributes) in CODE_TOKENS.items()}


class HarbourCodeDark(Style):
    """codeseek's syntax colours on a dark background."""

    name = "codeseek-harbour-dark"
    background_color = DARK_PALETTE["background"]
    highlight_color = DARK_PALETTE["cursor"]
    styles = _styles(DARK_PALETTE)


class HarbourCodeLight(Style):
    """codeseek's syntax colours on a light background."""

    name = "codeseek-harbour-light"
    background_color = LIGHT_PALETTE["background"]
    highlight_color = LIGHT_PALETTE["cursor"]
    styles = _styles(LIGHT_PALETTE)


def code_style(dark: bool) -> type[Style]:
    """The reader's pygments style for a dark or a light background."""
    return HarbourCodeDark if dark else HarbourCodeLight


@dataclass(frozen=True)
class CodeLook:
    """How the reader draws code: the syntax theme, and the style of the row marker."""

    syntax: SyntaxTheme
    mark: RichStyle


def code_look(dark: bool, no_color: bool) -> CodeLook:
    """The reader's look: our style and an amber marker, or (no colour) only bold and
    italic."""
    palette = DARK_PALETTE if dark else LIGHT_PALETTE
    if not no_color:
        return CodeLook(PygmentsSyntaxTheme(code_style(dark)),
                        RichStyle(color=palette["amber"], bold=True))
    return CodeLook(ANSISyntaxTheme({
        token: RichStyle(bold="bold" in attributes, italic="italic" in attributes,
                         underline="underline" in attributes)
        for token, (_colour, attributes) in CODE_TOKENS.items()
    }), RichStyle(bold=True))


def _theme(name: str, palette: Mapping[str, str], *, dark: bool) -> Theme:
    return Theme(
        name=name,
        primary=palette["teal"],
        secondary=palette["amber"],
        accent=palette["coral"],
        warning=palette["amber"],
        error=palette["red"],
        success=palette["green"],
        foreground=palette["foreground"],
        background=palette["background"],
        surface=palette["surface"],
        panel=palette["panel"],
        dark=dark,
        variables={
            "cs-bar": palette["teal"],
            "cs-name": palette["bright"],
            "cs-meta": palette["grey"],
            "cs-place": palette["amber"],
            "cs-doc": palette["slate"],
            "cs-scope": palette["sky"],
            "cs-chip": palette["teal"],
            "cs-key": palette["amber"],
            "cs-heading": palette["teal"],
            "block-cursor-background": palette["cursor"],
            "block-cursor-blurred-background": palette["cursor-blurred"],
            "block-cursor-text-style": "none",
            "footer-key-foreground": palette["amber"],
            "input-selection-background": f"{palette['teal']} 35%",
        },
    )


HARBOUR = _theme("codeseek-harbour", DARK_PALETTE, dark=True)
"""The UI on a dark background (the default)."""

HARBOUR_LIGHT = _theme("codeseek-harbour-light", LIGHT_PALETTE, dark=False)
"""The UI on a light background."""


def light_background(env: Mapping[str, str]) -> bool:
    """Whether the terminal says its background is light: ``COLORFGBG`` is
    ``FG;BG`` (or ``FG;X;BG``) with BG one of the light colours 7 or 15."""
    background = env.get("COLORFGBG", "").rsplit(";", 1)[-1].strip()
    return background in {"7", "15"}
