"""The JupyterLab workbench: ipywidgets panels over the public msmkit functions.

This is the only part of msmkit that imports ipywidgets (install with ``pip install
'msmkit[lab]'``). The panels hold no numerics of their own: every number they show comes from
a public function a script could call too.

>>> from msmkit import demo                                          # doctest: +SKIP
>>> from msmkit.widgets import Workbench                             # doctest: +SKIP
>>> Workbench(demo.trajectories(seed=0), dt=demo.DT, unit=demo.UNIT)  # doctest: +SKIP
"""
from .kinetics import KineticsPanel
from .lags import LagPanel
from .populations import PopulationsPanel
from .states import StatesPanel
from .validate import ValidationPanel
from .workbench import Workbench

__all__ = sorted(["KineticsPanel", "LagPanel", "PopulationsPanel", "StatesPanel", "ValidationPanel", "Workbench"])
