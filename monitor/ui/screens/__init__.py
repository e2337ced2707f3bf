"""The screens over the live view: the stage view, the relabel view and the label question."""

from monitor.ui.screens.ask import AskLabel
from monitor.ui.screens.relabel import RelabelScreen
from monitor.ui.screens.stage import StageScreen

__all__ = ["AskLabel", "RelabelScreen", "StageScreen"]
