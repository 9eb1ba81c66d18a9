"""plexwash studio: napari dock widgets over the plexwash engine (``plexwash studio``).

The npe2 manifest ``napari.yaml`` contributes a reader (OME-TIFF, OME-Zarr, TIFF with its
stains), a writer (image layers to one OME-TIFF / OME-Zarr stack), the demo cohort as
sample data, and five dock widgets: Cohort, Spillover, Speckle, Quality, Run.
"""

from __future__ import annotations

from pathlib import Path

#: Dock widget titles (as users see them), in the order they are docked.
WIDGETS = ("Cohort", "Spillover", "Speckle", "Quality", "Run")
PLUGIN = "plexwash"

__all__ = ["PLUGIN", "WIDGETS", "launch_studio"]


def launch_studio(cohort_dir: str | Path | None = None, *, viewer=None, show: bool = True,
                  run: bool = True):
    """Open napari with the five studio widgets docked and, optionally, a cohort listed.

    Parameters
    ----------
    cohort_dir : str or Path, optional
        A folder of ROIs to list in the Cohort widget (its first ROI is loaded).
    viewer : napari.Viewer, optional
        Dock into this viewer instead of making a new one.
    show : bool
        Show the window (False for tests and screenshots).
    run : bool
        Enter the Qt event loop (returns when the window closes). False returns at once.

    Returns
    -------
    napari.Viewer
        The viewer; ``viewer.window.dock_widgets`` holds the widgets by title.

    Raises
    ------
    plexwash.qc.errors.InputError
        When ``cohort_dir`` is not a readable cohort folder.
    """
    import napari
    from plexwash.qc.io import list_cohort
    from qtpy.QtCore import Qt, QTimer

    if cohort_dir is not None:
        list_cohort(cohort_dir)  # fail early, before a window opens, with the CLI's message
    if viewer is None:
        viewer = napari.Viewer(title="plexwash studio", show=show)
        made_here = True
    else:
        made_here = False
    widgets, docks = {}, {}
    classes = _widget_classes()
    for title in WIDGETS:
        # Cohort goes left on its own; the others share one tabbed column on the right. Docked
        # by name (not through the plugin menu) so that titles read "Speckle", not "Speckle (plexwash)"
        tabify = title not in ("Cohort", "Spillover")
        widget = classes[title](viewer)
        dock = viewer.window.add_dock_widget(widget, name=title, area="left" if title == "Cohort" else "right",
                                             tabify=tabify)
        widgets[title], docks[title] = widget, dock
    main = docks["Cohort"].parent()
    if made_here:
        _roomy(main)
    main.resizeDocks([docks["Cohort"], docks["Speckle"]], [340, 400], Qt.Orientation.Horizontal)
    _give_cohort_room(main, docks["Cohort"])
    QTimer.singleShot(0, lambda: _give_cohort_room(main, docks["Cohort"]))  # once laid out
    docks["Speckle"].raise_()
    if made_here:
        import gc

        # napari collects garbage on the GUI thread after layer changes: 0.3 s per collection
        # over the half a million objects of a started studio. They live as long as the window,
        # so move them out of the collector's sight (later objects are still collected).
        gc.freeze()
        widgets["Cohort"].state.owns_process = True
    if cohort_dir is not None:
        cohort = widgets["Cohort"]
        cohort.open_cohort(cohort_dir)
        if cohort.table.rowCount():
            cohort.load(0)
    if run:
        napari.run()
    return viewer


def _widget_classes() -> dict:
    """Dock title -> widget class, from the npe2 manifest (the one list of the widgets)."""
    import importlib

    import yaml

    manifest = yaml.safe_load((Path(__file__).with_name("napari.yaml")).read_text(encoding="utf-8"))
    commands = {c["id"]: c["python_name"] for c in manifest["contributions"]["commands"]}
    out = {}
    for entry in manifest["contributions"]["widgets"]:
        module, _, name = commands[entry["command"]].partition(":")
        out[entry["display_name"]] = getattr(importlib.import_module(module), name)
    return out


def _give_cohort_room(main, cohort_dock) -> None:
    """Share the left column: compact layer controls and list above, the Cohort widget below."""
    from qtpy.QtCore import Qt
    from qtpy.QtWidgets import QDockWidget

    left = [d for d in main.findChildren(QDockWidget)
            if main.dockWidgetArea(d) == Qt.DockWidgetArea.LeftDockWidgetArea and d.isVisible()
            and d is not cohort_dock]
    if not left:
        return
    height = max(main.height(), 900)
    share = [int(height * 0.22)] * len(left)
    main.resizeDocks(left + [cohort_dock], share + [height - sum(share)], Qt.Orientation.Vertical)


def _roomy(main) -> None:
    """Five docks need room: grow a small window to most of the screen (at most 1680 x 1050)."""
    from qtpy.QtWidgets import QApplication

    screen = QApplication.primaryScreen()
    if screen is None:
        return
    area = screen.availableGeometry()
    width, height = min(1680, int(area.width() * 0.92)), min(1050, int(area.height() * 0.92))
    if main.width() < width or main.height() < height:
        main.resize(max(main.width(), width), max(main.height(), height))
