"""The dashboard's colours and themes (our own palette; every state also has a text).

Colour is never the only carrier of meaning: lamps, bars and fault marks all say in
words what they show, so the dashboard reads the same to a colour-blind operator and
on a monochrome screenshot.
"""

from __future__ import annotations

from pathlib import Path

import dearpygui.dearpygui as dpg

RGB = tuple[int, int, int] | tuple[int, int, int, int]

BACKGROUND: RGB = (22, 27, 33)
PANEL: RGB = (30, 36, 44)
TEXT: RGB = (226, 230, 236)
BANNER_BG: RGB = (150, 104, 0)          # caution amber, darkened so white text reads
BANNER_TEXT: RGB = (255, 250, 235)
ESTOP_BG: RGB = (176, 18, 24)
ESTOP_HOVER: RGB = (206, 36, 40)
ALARM_BG: RGB = (150, 30, 30)
OK_BG: RGB = (44, 78, 60)
IDLE_BG: RGB = (60, 66, 76)
SERIES = {                               # by tick-record prefix
    "ref": (235, 235, 235), "y": (70, 200, 190), "sent": (150, 130, 250),
    "cmd": (245, 165, 60), "u": (185, 225, 80), "x": (120, 170, 240),
}
LIMIT_LINE: RGB = (232, 86, 86)
FAULT_FILL: RGB = (214, 70, 214, 70)
BOLD_FONTS = ("/usr/share/fonts/truetype/dejavu/DejaVuSans-Bold.ttf",
              "/usr/share/fonts/dejavu/DejaVuSans-Bold.ttf")


def _colour_theme(targets: list[tuple[int, RGB, int]], item: int = dpg.mvAll) -> int | str:
    with dpg.theme() as theme, dpg.theme_component(item):
        for target, colour, category in targets:
            dpg.add_theme_color(target, colour, category=category)
    return theme


class Themes:
    """Themes created once per dearpygui context and bound to items by the view."""

    def __init__(self) -> None:
        core, plots = dpg.mvThemeCat_Core, dpg.mvThemeCat_Plots
        with dpg.theme() as self.base, dpg.theme_component(dpg.mvAll):
            dpg.add_theme_color(dpg.mvThemeCol_WindowBg, BACKGROUND, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_ChildBg, PANEL, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_Text, TEXT, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_FrameRounding, 3, category=core)
            dpg.add_theme_style(dpg.mvStyleVar_ChildRounding, 4, category=core)
            # room above and below the data so band lines at the rig range stay visible
            dpg.add_theme_style(dpg.mvPlotStyleVar_FitPadding, 0.02, 0.08,
                                category=dpg.mvThemeCat_Plots)
        self.banner = _colour_theme([(dpg.mvThemeCol_ChildBg, BANNER_BG, core),
                                     (dpg.mvThemeCol_Text, BANNER_TEXT, core)])
        self.estop = self._button(ESTOP_BG, ESTOP_HOVER)
        self.alarm = self._button(ALARM_BG, ALARM_BG)
        self.ok = self._button(OK_BG, OK_BG)
        self.idle = self._button(IDLE_BG, IDLE_BG)
        self.bar_alarm = _colour_theme([(dpg.mvThemeCol_PlotHistogram, ALARM_BG, core)])
        self.bar_ok = _colour_theme([(dpg.mvThemeCol_PlotHistogram, (60, 130, 150), core)])
        self.series = {p: _colour_theme([(dpg.mvPlotCol_Line, c, plots)], dpg.mvLineSeries)
                       for p, c in SERIES.items()}
        self.limit = _colour_theme([(dpg.mvPlotCol_Line, LIMIT_LINE, plots)],
                                   dpg.mvInfLineSeries)
        self.fault = _colour_theme([(dpg.mvPlotCol_Fill, FAULT_FILL, plots)],
                                   dpg.mvShadeSeries)
        self.big_font = None
        for path in BOLD_FONTS:
            if Path(path).is_file():
                with dpg.font_registry():
                    self.big_font = dpg.add_font(path, 26)
                break
        dpg.bind_theme(self.base)

    @staticmethod
    def _button(colour: RGB, hover: RGB) -> int | str:
        core = dpg.mvThemeCat_Core
        with dpg.theme() as theme, dpg.theme_component(dpg.mvButton):
            dpg.add_theme_color(dpg.mvThemeCol_Button, colour, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_ButtonHovered, hover, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_ButtonActive, hover, category=core)
            dpg.add_theme_color(dpg.mvThemeCol_Text, (255, 255, 255), category=core)
        return theme
