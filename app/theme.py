"""Colours, fonts and the window style.

Palette: the Okabe-Ito colour-blind-safe set (Okabe & Ito, "Color Universal
Design", 2002/2008), eight colours that stay distinguishable for the common
forms of colour blindness. Colour is never the only cue: keypoint handles
also differ by shape (circle for a person's point, diamond for a machine's, with a white
centre pip when the project's correction adapted it)
and fill (filled visible, ring occluded), and states carry their names.
"""
from __future__ import annotations

from PySide6.QtGui import QColor, QFont, QPalette

# Okabe-Ito
BLACK = "#000000"
ORANGE = "#E69F00"
SKY_BLUE = "#56B4E9"
BLUISH_GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"

# Neutral greys for the calm dark surround (not part of Okabe-Ito; they carry no meaning).
BASE = "#1d1f23"
PANEL = "#25282d"
RAISED = "#2e3238"
LINE = "#3a3f46"
TEXT = "#e4e6e9"
MUTED = "#9aa1aa"
FAINT = "#6b727b"

# Keypoint side: left / right / middle of the body.
SIDE_COLOURS = {"left": SKY_BLUE, "right": ORANGE, "middle": REDDISH_PURPLE}

# Annotation states (plus "blank": nothing stored yet).
STATE_COLOURS = {
    "blank": FAINT,
    "prefilled": SKY_BLUE,
    "drafting": YELLOW,
    "in_review": BLUE,
    "accepted": BLUISH_GREEN,
    "returned": VERMILLION,
}
STATE_WORDS = {
    "blank": "blank", "prefilled": "pre-filled", "drafting": "drafting",
    "in_review": "in review", "accepted": "accepted", "returned": "returned",
}
STATE_ORDER = ("blank", "prefilled", "drafting", "in_review", "accepted", "returned")


def side_of(name: str) -> str:
    if name.startswith("left_") or name.startswith("l_"):
        return "left"
    if name.startswith("right_") or name.startswith("r_"):
        return "right"
    return "middle"


def qcolor(hex_: str, alpha: int = 255) -> QColor:
    c = QColor(hex_)
    c.setAlpha(alpha)
    return c


def apply(app):
    """The Fusion style with a dark neutral palette: the picture is the brightest thing on screen."""
    app.setStyle("Fusion")
    pal = QPalette()
    pal.setColor(QPalette.Window, QColor(PANEL))
    pal.setColor(QPalette.WindowText, QColor(TEXT))
    pal.setColor(QPalette.Base, QColor(BASE))
    pal.setColor(QPalette.AlternateBase, QColor(RAISED))
    pal.setColor(QPalette.Text, QColor(TEXT))
    pal.setColor(QPalette.Button, QColor(RAISED))
    pal.setColor(QPalette.ButtonText, QColor(TEXT))
    pal.setColor(QPalette.Highlight, QColor(BLUE))
    pal.setColor(QPalette.HighlightedText, QColor("#ffffff"))
    pal.setColor(QPalette.ToolTipBase, QColor(RAISED))
    pal.setColor(QPalette.ToolTipText, QColor(TEXT))
    pal.setColor(QPalette.PlaceholderText, QColor(FAINT))
    for role in (QPalette.WindowText, QPalette.Text, QPalette.ButtonText):
        pal.setColor(QPalette.Disabled, role, QColor(FAINT))
    app.setPalette(pal)
    f = QFont(app.font())
    if f.pointSizeF() < 10:
        f.setPointSizeF(10)
    app.setFont(f)
    app.setStyleSheet(STYLE)


STYLE = f"""
QMainWindow, QWidget#page {{ background: {PANEL}; }}
QSplitter::handle {{ background: {BASE}; }}
QTabWidget::pane {{ border: none; }}
QTabBar::tab {{ background: {PANEL}; color: {MUTED}; padding: 6px 16px; border: none;
               border-bottom: 2px solid transparent; }}
QTabBar::tab:selected {{ color: {TEXT}; border-bottom: 2px solid {SKY_BLUE}; }}
QLabel#heading {{ color: {TEXT}; font-weight: 600; }}
QLabel#muted, QLabel#hint {{ color: {MUTED}; }}
QLabel#tuneHint {{ color: {TEXT}; background: {RAISED}; border-left: 3px solid {BLUISH_GREEN};
                  padding: 4px 6px; }}
QLabel#frameline {{ color: {TEXT}; padding: 4px 8px; }}
QTableWidget, QListWidget {{ background: {BASE}; border: none; gridline-color: {PANEL};
                            selection-background-color: {RAISED}; selection-color: {TEXT}; }}
QHeaderView::section {{ background: {PANEL}; color: {MUTED}; border: none; padding: 3px 6px; }}
QProgressBar {{ background: {BASE}; border: none; height: 8px; border-radius: 4px; color: transparent; }}
QProgressBar::chunk {{ background: {BLUISH_GREEN}; border-radius: 4px; }}
QPushButton {{ background: {RAISED}; border: 1px solid {LINE}; padding: 5px 12px; border-radius: 3px; }}
QPushButton:hover {{ border-color: {SKY_BLUE}; }}
QStatusBar {{ background: {BASE}; color: {MUTED}; }}
QStatusBar QLabel {{ color: {MUTED}; padding: 0 8px; }}
QMenuBar {{ background: {PANEL}; }}
QMenu {{ background: {RAISED}; border: 1px solid {LINE}; }}
QMenu::item:selected {{ background: {BLUE}; }}
"""
