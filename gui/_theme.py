"""The dashboard's one palette ("paper and ink") and the themes built from it.

Why a light palette: a bench dashboard is shown on projectors and printed in test
reports. Projectors wash out dark greys, and a dark screen prints as a block of toner;
dark ink on warm paper survives both. Every colour below has a job:

- paper, panel, field, rule, grid: the quiet surfaces; nothing in them asks for
  attention.
- ink: text and the reference; ink_soft: secondary text and quiet lamps.
- accent (a dark teal): what the operator handles (slider grips, check marks, focus).
- plant blue, thick lines: what the plant really has (true output, applied input).
  controller orange, thin lines: what the controller side says or sees (command,
  reading). The two differ in hue, lightness and line weight, so they stay apart on a
  monochrome print too (dark and thick versus mid-grey and thin).
- attention amber and alarm red appear only when something needs the operator (a
  limit warning, a fault, a latched trip); the words beside them always say the same.
- the caution banner is yellow with black text, the usual caution pairing (common
  practice, after ISO 3864 safety colours); the software E-stop is red with white text.

Colour is never the only carrier of meaning: lamps, bars and fault marks all say in
words what they show, so the dashboard reads the same to a colour-blind operator.
Every colour slot of the toolkit is set (``ALL_SLOTS``), so none of its stock theme is
left on screen.
"""

from __future__ import annotations

from pathlib import Path

import dearpygui.dearpygui as dpg

RGB = tuple[int, int, int] | tuple[int, int, int, int]

PAPER: RGB = (244, 242, 236)
PANEL: RGB = (234, 231, 223)
FIELD: RGB = (253, 252, 248)
RULE: RGB = (150, 145, 135)
GRID: RGB = (216, 212, 202)
INK: RGB = (26, 28, 32)
INK_SOFT: RGB = (88, 92, 100)
ACCENT: RGB = (0, 96, 108)
ACCENT_DARK: RGB = (0, 66, 76)
HOVER: RGB = (212, 228, 226)
PRESSED: RGB = (186, 212, 212)
BUTTON: RGB = (220, 216, 206)
BAR_QUIET: RGB = (196, 190, 178)
PLANT_BLUE: RGB = (22, 72, 168)
CONTROLLER_ORANGE: RGB = (222, 118, 0)
ATTENTION: RGB = (214, 132, 0)
ALARM: RGB = (170, 20, 28)
ALARM_TEXT: RGB = (255, 255, 255)
ALARM_DEEP: RGB = (112, 12, 18)
BANNER_BG: RGB = (246, 206, 72)
BANNER_TEXT: RGB = INK
ESTOP_BG: RGB = (196, 16, 24)
ESTOP_HOVER: RGB = (222, 40, 44)
LIMIT_LINE: RGB = (120, 116, 108)
FAULT_FILL: RGB = (214, 132, 0, 56)
CLEAR: RGB = (0, 0, 0, 0)

# by tick-record prefix: (colour, line weight in pixels)
SERIES: dict[str, tuple[RGB, float]] = {
    "ref": (INK, 1.5),
    "y": (PLANT_BLUE, 3.0), "u": (PLANT_BLUE, 3.0), "x": (PLANT_BLUE, 3.0),
    "sent": (CONTROLLER_ORANGE, 1.5), "cmd": (CONTROLLER_ORANGE, 1.5),
}
FONTS = ("/usr/share/fonts/truetype/dejavu/DejaVuSansCondensed.ttf",
         "/usr/share/fonts/dejavu/DejaVuSansCondensed.ttf")
BOLD_FONTS = ("/usr/share/fonts/truetype/dejavu/DejaVuSans-Bold.ttf",
              "/usr/share/fonts/dejavu/DejaVuSans-Bold.ttf")
BODY_SIZE, ESTOP_SIZE = 15, 26


def _roles() -> dict[str, RGB]:
    """Colour for every slot of the toolkit's widgets and plots, by slot name."""
    quiet = {"Border": RULE, "BorderShadow": CLEAR, "Text": INK, "TextDisabled": INK_SOFT,
             "WindowBg": PAPER, "ChildBg": PANEL, "PopupBg": FIELD, "MenuBarBg": PANEL,
             "FrameBg": FIELD, "FrameBgHovered": HOVER, "FrameBgActive": PRESSED,
             "TitleBg": PANEL, "TitleBgActive": PANEL, "TitleBgCollapsed": PANEL,
             "ScrollbarBg": PANEL, "ScrollbarGrab": RULE, "ScrollbarGrabHovered": INK_SOFT,
             "ScrollbarGrabActive": ACCENT, "CheckMark": ACCENT, "SliderGrab": ACCENT,
             "SliderGrabActive": ACCENT_DARK, "Button": BUTTON, "ButtonHovered": HOVER,
             "ButtonActive": PRESSED, "Header": BUTTON, "HeaderHovered": HOVER,
             "HeaderActive": PRESSED, "Separator": RULE, "SeparatorHovered": ACCENT,
             "SeparatorActive": ACCENT_DARK, "ResizeGrip": RULE, "ResizeGripHovered": ACCENT,
             "ResizeGripActive": ACCENT_DARK, "InputTextCursor": INK, "TreeLines": RULE,
             "PlotLines": INK, "PlotLinesHovered": ACCENT, "PlotHistogram": INK_SOFT,
             "PlotHistogramHovered": ACCENT, "TableHeaderBg": BUTTON,
             "TableBorderStrong": RULE, "TableBorderLight": GRID, "TableRowBg": CLEAR,
             "TableRowBgAlt": (0, 0, 0, 14), "TextSelectedBg": PRESSED,
             "DragDropTarget": ACCENT, "DragDropTargetBg": CLEAR, "NavHighlight": ACCENT,
             "NavCursor": ACCENT, "NavWindowingHighlight": ACCENT,
             "NavWindowingDimBg": (0, 0, 0, 40), "ModalWindowDimBg": (0, 0, 0, 60),
             "DockingPreview": ACCENT, "DockingEmptyBg": PAPER, "UnsavedMarker": INK}
    for tab in ("Tab", "TabActive", "TabDimmed", "TabDimmedSelected", "TabHovered",
                "TabSelected", "TabUnfocused", "TabUnfocusedActive"):
        quiet[tab] = PRESSED if "Selected" in tab or tab.endswith("Active") else BUTTON
    for overline in ("TabSelectedOverline", "TabDimmedSelectedOverline"):
        quiet[overline] = ACCENT
    plots = {"FrameBg": PANEL, "PlotBg": FIELD, "PlotBorder": RULE, "LegendBg": FIELD,
             "LegendBorder": RULE, "LegendText": INK, "TitleText": INK, "InlayText": INK,
             "AxisText": INK, "AxisGrid": GRID, "AxisTick": RULE, "AxisBg": CLEAR,
             "AxisBgHovered": HOVER, "AxisBgActive": PRESSED, "Selection": ACCENT,
             "Crosshairs": INK_SOFT, "Line": INK, "Fill": GRID, "MarkerFill": INK,
             "MarkerOutline": INK, "ErrorBar": INK}
    return {**{f"mvThemeCol_{k}": v for k, v in quiet.items()},
            **{f"mvPlotCol_{k}": v for k, v in plots.items()}}


ROLES = _roles()
ALL_SLOTS = sorted(n for n in dir(dpg) if n.startswith(("mvThemeCol_", "mvPlotCol_")))


def _colour_theme(targets: list[tuple[int, RGB, int]], item: int = dpg.mvAll) -> int | str:
    with dpg.theme() as theme, dpg.theme_component(item):
        for target, colour, category in targets:
            dpg.add_theme_color(target, colour, category=category)
    return theme


def _first_file(paths: tuple[str, ...]) -> str | None:
    return next((p for p in paths if Path(p).is_file()), None)


class Themes:
    """Themes created once per dearpygui context and bound to items by the view."""

    def __init__(self) -> None:
        core, plots = dpg.mvThemeCat_Core, dpg.mvThemeCat_Plots
        with dpg.theme() as self.base, dpg.theme_component(dpg.mvAll):
            for slot in ALL_SLOTS:
                # a slot a later toolkit release adds gets a quiet colour until it has a role
                category = plots if slot.startswith("mvPlotCol_") else core
                dpg.add_theme_color(getattr(dpg, slot), ROLES.get(slot, INK_SOFT),
                                    category=category)
            dpg.add_theme_style(dpg.mvStyleVar_FrameRounding, 2, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_ChildRounding, 2, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_FrameBorderSize, 1, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_ChildBorderSize, 1, category=core)
            # room above and below the data so band lines at the rig range stay visible
            dpg.add_theme_style(dpg.mvPlotStyleVar_FitPadding, 0.02, 0.08, category=plots)
        self.banner = _colour_theme([(dpg.mvThemeCol_ChildBg, BANNER_BG, core),
                                     (dpg.mvThemeCol_Border, INK, core),
                                     (dpg.mvThemeCol_Text, BANNER_TEXT, core)])
        self.estop = self._button(ESTOP_BG, ESTOP_HOVER, ALARM_TEXT)
        self.alarm = self._lamp(ALARM, ALARM_TEXT)
        self.attention = self._lamp(ATTENTION, INK)
        self.quiet = self._lamp(PANEL, INK_SOFT)
        # a bar's words sit across its fill and its background: a tripped bar is red on
        # darker red with white words, the others dark words on light
        self.bar = {0: _colour_theme([(dpg.mvThemeCol_PlotHistogram, BAR_QUIET, core)]),
                    1: _colour_theme([(dpg.mvThemeCol_PlotHistogram, ATTENTION, core)]),
                    2: _colour_theme([(dpg.mvThemeCol_PlotHistogram, ALARM, core),
                                      (dpg.mvThemeCol_FrameBg, ALARM_DEEP, core),
                                      (dpg.mvThemeCol_Text, ALARM_TEXT, core)])}
        self.series = {}
        for prefix, (colour, weight) in SERIES.items():
            with dpg.theme() as theme, dpg.theme_component(dpg.mvLineSeries):
                dpg.add_theme_color(dpg.mvPlotCol_Line, colour, category=plots)
                dpg.add_theme_style(dpg.mvPlotStyleVar_LineWeight, weight, category=plots)
            self.series[prefix] = theme
        self.limit = _colour_theme([(dpg.mvPlotCol_Line, LIMIT_LINE, plots)],
                                   dpg.mvInfLineSeries)
        # status looks that are neither live-normal nor alarm: a replay (accent, white
        # words) and a run that is over (ink, paper words)
        self.replay = self._lamp(ACCENT, ALARM_TEXT)
        self.ended = self._lamp(INK, PAPER)
        self.line = {1: self._inf_line(ATTENTION, 2.0), 2: self._inf_line(ALARM, 2.0)}
        self.trip_time = self._inf_line(ALARM, 1.0)
        with dpg.theme() as self.trip_mark, dpg.theme_component(dpg.mvScatterSeries):
            dpg.add_theme_color(dpg.mvPlotCol_MarkerFill, ALARM, category=plots)
            dpg.add_theme_color(dpg.mvPlotCol_MarkerOutline, ALARM_DEEP, category=plots)
            dpg.add_theme_color(dpg.mvPlotCol_Line, ALARM, category=plots)
            dpg.add_theme_style(dpg.mvPlotStyleVar_Marker, dpg.mvPlotMarker_Diamond,
                                category=plots)
            dpg.add_theme_style(dpg.mvPlotStyleVar_MarkerSize, 6, category=plots)
        self.fault = _colour_theme([(dpg.mvPlotCol_Fill, FAULT_FILL, plots)],
                                   dpg.mvShadeSeries)
        self.big_font = None
        body, bold = _first_file(FONTS), _first_file(BOLD_FONTS)
        with dpg.font_registry():
            if body is not None:
                dpg.bind_font(dpg.add_font(body, BODY_SIZE))
            if bold is not None:
                self.big_font = dpg.add_font(bold, ESTOP_SIZE)
        dpg.bind_theme(self.base)

    @staticmethod
    def _button(colour: RGB, hover: RGB, text: RGB) -> int | str:
        core = dpg.mvThemeCat_Core
        with dpg.theme() as theme, dpg.theme_component(dpg.mvButton):
            dpg.add_theme_color(dpg.mvThemeCol_Button, colour, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_ButtonHovered, hover, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_ButtonActive, hover, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_Text, text, category=core)
        return theme

    @staticmethod
    def _inf_line(colour: RGB, weight: float) -> int | str:
        plots = dpg.mvThemeCat_Plots
        with dpg.theme() as theme, dpg.theme_component(dpg.mvInfLineSeries):
            dpg.add_theme_color(dpg.mvPlotCol_Line, colour, category=plots)
            dpg.add_theme_style(dpg.mvPlotStyleVar_LineWeight, weight, category=plots)
        return theme

    @staticmethod
    def _lamp(colour: RGB, text: RGB) -> int | str:
        """A lamp is a button that does nothing: its text on the left, never hovered."""
        core = dpg.mvThemeCat_Core
        with dpg.theme() as theme, dpg.theme_component(dpg.mvButton):
            for slot in (dpg.mvThemeCol_Button, dpg.mvThemeCol_ButtonHovered,
                         dpg.mvThemeCol_ButtonActive):
                dpg.add_theme_color(slot, colour, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_Text, text, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_ButtonTextAlign, 0.0, 0.5, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_FramePadding, 8, 4, category=core)
        return theme
