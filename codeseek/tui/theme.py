"""The colours of the UI: one textual theme, with codeseek's own named colours.

``app.tcss`` and the rendered text refer to these names (``$primary``,
``$cs-place``, ...), never to colour codes.
"""

from __future__ import annotations

from textual.theme import Theme

HARBOUR = Theme(
    name="codeseek-harbour",
    primary="#3fb8a8",
    secondary="#e0a84f",
    accent="#e07a5f",
    warning="#e0a84f",
    error="#e05f5f",
    success="#7bc47f",
    foreground="#d8e1e6",
    background="#10171d",
    surface="#162028",
    panel="#1f2c35",
    dark=True,
    variables={
        "cs-bar": "#3fb8a8",
        "cs-name": "#f0f4f6",
        "cs-meta": "#7f939e",
        "cs-place": "#e0a84f",
        "cs-doc": "#a9bac3",
        "cs-scope": "#8fc7e0",
        "cs-chip": "#3fb8a8",
        "cs-key": "#e0a84f",
        "cs-heading": "#3fb8a8",
        "block-cursor-background": "#25505a",
        "block-cursor-blurred-background": "#1f3640",
        "block-cursor-text-style": "none",
        "footer-key-foreground": "#e0a84f",
        "input-selection-background": "#3fb8a8 35%",
    },
)
