"""Review widgets: a finding table, a detail card of one finding, and verdict buttons.

``ReviewPanel`` (the dock widget of the manifest) combines the three. Reading and writing go
through :mod:`pipeline.review`; this module only lays out what it returns. Qt comes through
``qtpy`` only; napari is imported under ``TYPE_CHECKING`` (napari injects the viewer).
"""

from __future__ import annotations

import html
import logging
from typing import TYPE_CHECKING, Any

from qtpy.QtCore import Qt, Signal
from qtpy.QtWidgets import (
    QAbstractItemView,
    QAbstractScrollArea,
    QComboBox,
    QGridLayout,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QPushButton,
    QSplitter,
    QTableWidget,
    QTableWidgetItem,
    QTextBrowser,
    QVBoxLayout,
    QWidget,
)

from pipeline import review
from pipeline.errors import InputError
from viewer_plugins._reader import RUN_KEY

if TYPE_CHECKING:
    import napari

log = logging.getLogger(__name__)

ALL = "all"
COLUMNS = ("ID", "Type", "Kind", "Depth (µm)", "Length (µm)", "Margin", "Verdict", "Review")
SORT_ROLE = Qt.ItemDataRole.UserRole + 1
ID_ROLE = Qt.ItemDataRole.UserRole


def _pm(value: float | None, sigma: float | None, digits: int = 1) -> str:
    if value is None:
        return "–"
    if sigma is None:
        return f"{value:.{digits}f}"
    return f"{value:.{digits}f} ± {sigma:.{digits}f}"


def _camera(viewer: napari.viewer.Viewer):
    """The viewer's camera (``viewer.scene.camera`` from napari 0.9, ``viewer.camera`` before)."""
    scene = getattr(viewer, "scene", None)
    return scene.camera if scene is not None else viewer.camera


class _SortItem(QTableWidgetItem):
    """A cell that sorts by a stored key (numbers numerically, blanks last) not by its text."""

    def __lt__(self, other: QTableWidgetItem) -> bool:
        a, b = self.data(SORT_ROLE), other.data(SORT_ROLE)
        if a is None or b is None:
            return a is not None  # values before blanks
        return a < b


class DefectTable(QWidget):
    """Sortable table of every finding with filters by kind, verdict and review status.

    Emits ``defect_selected(id)`` when a row is selected.
    """

    defect_selected = Signal(int)

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.kind_filter = QComboBox()
        self.verdict_filter = QComboBox()
        self.review_filter = QComboBox()
        filters = QGridLayout()  # one filter per row: a dock is narrow
        for r, (label, combo) in enumerate((("Kind", self.kind_filter), ("Verdict", self.verdict_filter),
                                            ("Review", self.review_filter))):
            filters.addWidget(QLabel(label), r, 0)
            filters.addWidget(combo, r, 1)
            combo.currentTextChanged.connect(self._apply_filters)
        filters.setColumnStretch(1, 1)
        self.table = QTableWidget(0, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(COLUMNS)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setSortIndicator(0, Qt.SortOrder.AscendingOrder)
        # scroll sideways instead of widening the dock to fit every column
        self.table.setSizeAdjustPolicy(QAbstractScrollArea.SizeAdjustPolicy.AdjustIgnored)
        self.table.setMinimumWidth(240)
        self.table.itemSelectionChanged.connect(self._on_selection)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addLayout(filters)
        lay.addWidget(self.table)
        self._rows: list[dict] = []

    # -- content -------------------------------------------------------------------------------
    def set_rows(self, rows: list[dict]) -> None:
        """Show ``rows`` (:func:`pipeline.review.defect_rows`), keeping filters and selection."""
        selected = self.selected_id()
        self._rows = list(rows)
        self.table.blockSignals(True)
        self.table.setSortingEnabled(False)  # inserting into a sorted table scrambles rows
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            cells = [
                (str(row["id"]), row["id"]),
                (row["type"], row["type"]),
                (row["kind"], row["kind"]),
                (_pm(row["depth_um"], row["depth_sigma_um"]), row["depth_um"]),
                (_pm(row["length_um"], row["length_sigma_um"]), row["length_um"]),
                (_pm(row["margin"], None, 2), row["margin"]),
                (row["verdict"], row["verdict"]),
                (row["review"], row["review"]),
            ]
            for c, (text, key) in enumerate(cells):
                item = _SortItem(text)
                item.setData(SORT_ROLE, key)
                item.setData(ID_ROLE, row["id"])
                self.table.setItem(r, c, item)
        self.table.setSortingEnabled(True)
        self._refill_filters()
        self.table.blockSignals(False)
        self._apply_filters()
        if selected is not None:
            self.select_id(selected, emit=False)

    def _refill_filters(self) -> None:
        for combo, key in ((self.kind_filter, "kind"), (self.verdict_filter, "verdict"),
                           (self.review_filter, "review")):
            current = combo.currentText() or ALL
            values = sorted({str(r[key]) for r in self._rows})
            if key == "review":
                values = sorted(set(values) | set(review.REVIEW_STATUSES))
            combo.blockSignals(True)
            combo.clear()
            combo.addItems([ALL, *values])
            combo.setCurrentText(current if current in values else ALL)
            combo.blockSignals(False)

    def _apply_filters(self, *_: Any) -> None:
        want = {2: self.kind_filter.currentText(), 6: self.verdict_filter.currentText(),
                7: self.review_filter.currentText()}
        for r in range(self.table.rowCount()):
            hide = any(v not in ("", ALL) and self.table.item(r, c).text() != v for c, v in want.items())
            self.table.setRowHidden(r, hide)

    def visible_ids(self) -> list[int]:
        """Ids of the rows the filters let through, in display order."""
        return [int(self.table.item(r, 0).data(ID_ROLE)) for r in range(self.table.rowCount())
                if not self.table.isRowHidden(r)]

    # -- selection -----------------------------------------------------------------------------
    def selected_id(self) -> int | None:
        rows = self.table.selectionModel().selectedRows() if self.table.selectionModel() else []
        if not rows:
            return None
        return int(self.table.item(rows[0].row(), 0).data(ID_ROLE))

    def select_id(self, defect_id: int, *, emit: bool = True) -> bool:
        """Select the row of ``defect_id``; False if it is not in the table."""
        for r in range(self.table.rowCount()):
            if int(self.table.item(r, 0).data(ID_ROLE)) == int(defect_id):
                self.table.blockSignals(not emit)
                self.table.selectRow(r)
                self.table.blockSignals(False)
                return True
        return False

    def _on_selection(self) -> None:
        did = self.selected_id()
        if did is not None:
            self.defect_selected.emit(did)


class CrackDetail(QTextBrowser):
    """The measured numbers of one finding with their one-sigma uncertainties, its front fit and,
    for an assessed crack, the margin and the worst moment of the thermal process."""

    def show_defect(self, detail: dict | None) -> None:
        """Render :func:`pipeline.review.crack_detail`'s result (None clears the card)."""
        if detail is None:
            self.setHtml("<i>Select a finding in the table.</i>")
            return
        self.setHtml(detail_html(detail))


def detail_html(detail: dict) -> str:
    """HTML card of one finding (numbers exactly as stored, units from their keys)."""
    d, a, typ = detail["defect"], detail["assessment"], detail["type"]
    esc = html.escape
    rows: list[tuple[str, str]] = []
    if typ == "crack":
        u = d["uncertainty"]
        pl, fr, pos = d["plane"], d["front"], d["position"]
        title = f"Crack {d['id']} — {esc(d['kind'])}"
        rows += [
            ("Depth a", f"{_pm(d['depth_um'], u['depth_um'])} µm"),
            ("Length 2c", f"{_pm(d['length_um'], u['length_um'])} µm"),
            ("Inclination", f"{_pm(pl['inclination_deg'], u['inclination_deg'])}°"),
            ("Azimuth", f"{pl['azimuth_deg']:.1f}°"),
            ("Nearest plane", f"({' '.join(map(str, pl['nearest_hkl']))}) {esc(pl.get('family', ''))},"
                              f" misfit {pl['misfit_deg']:.1f}°"),
            ("Depth span z", f"{d['thickness_span_um'][0]:.1f} – {d['thickness_span_um'][1]:.1f} µm"),
            ("Centroid x, y, z", ", ".join(f"{v:.1f}" for v in d["centroid_um"]) + " µm"),
        ]
        if pos.get("r_mm") is not None:
            rows.append(("Radius / angle", f"{pos['r_mm']:.2f} mm / {pos['angle_deg']:.1f}°"))
        if pos.get("distance_to_edge_um") is not None:
            rows.append(("To wafer edge", f"{pos['distance_to_edge_um']:.0f} µm"))
        rows += [
            ("Front fit", f"{esc(fr.get('shape', 'ellipse'))}: a = {fr['a_um']:.1f} µm, "
                          f"c = {fr['c_um']:.1f} µm, a/c = {fr['aspect']:.2f}"),
            ("Front residual", f"{fr['fit_rms_um']:.2f} µm RMS over {len(fr['points_um'])} points"),
        ]
        if u.get("method"):
            rows.append(("Uncertainty", f"one sigma, {esc(u['method'])}"))
        if a:
            rows += [
                ("Verdict", f"<b>{esc(str(a.get('verdict', '')))}</b>"),
                ("Margin K_IC/K_I,max", f"<b>{a['margin']:.2f}</b>" if a.get("margin") is not None else "–"),
                ("K_I,max / K_IC", f"{a.get('K_I_max_MPa_sqrt_m', float('nan')):.3g} / "
                                   f"{a.get('K_IC_MPa_sqrt_m', float('nan')):.3g} MPa√m"),
                ("Worst moment", f"t = {a.get('worst_time_s', float('nan')):.1f} s, "
                                 f"σ = {a.get('sigma_at_worst_MPa', float('nan')):.1f} MPa"),
                ("Critical ΔT", f"{a.get('critical_dT_C', float('nan')):.0f} °C"),
                ("Model", esc(str(a.get("model", "")))),
            ]
            for note in a.get("notes", []) or []:
                rows.append(("Note", esc(str(note))))
        else:
            rows.append(("Assessment", "not assessed (no assessment.json entry)"))
    elif typ == "loop":
        title = f"Dislocation loop {d['id']}"
        rows += [
            ("Diameter", f"{d['diameter_um']:.1f} µm"),
            ("Centre x, y, z", ", ".join(f"{v:.1f}" for v in d["center_um"]) + " µm"),
            ("Plane", f"({' '.join(map(str, d['plane']['nearest_hkl']))}), "
                      f"inclination {d['plane']['inclination_deg']:.1f}°"),
            ("Meets a surface", "yes" if d["meets_surface"] else "no"),
        ]
    else:
        title = f"Slip band {d['id']}"
        rows += [("Extent", f"{d['extent_um']:.1f} µm"), ("Lines", str(d["count"])),
                 ("Direction", ", ".join(f"{v:.3f}" for v in d["direction"]))]
    rv = d.get("review", {})
    rows.append(("Review", esc(rv.get("status", "unreviewed"))
                 + (f" by {esc(rv['reviewer'])}" if rv.get("reviewer") else "")
                 + (f": {esc(rv['note'])}" if rv.get("note") else "")))
    body = "".join(f"<tr><td>{k}</td><td>{v}</td></tr>" for k, v in rows)
    return f"<h3>{title}</h3><table cellspacing='2'>{body}</table>"


class ReviewControls(QWidget):
    """Accept / reject / reset buttons and a note for the selected finding.

    Emits ``verdict(status, note, reviewer)``; the panel writes it through
    :func:`pipeline.review.apply_review`.
    """

    verdict = Signal(str, str, str)

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.target = QLabel("no finding selected")
        self.note = QLineEdit()
        self.note.setPlaceholderText("note kept with the verdict")
        self.reviewer = QLineEdit()
        self.reviewer.setPlaceholderText("your initials")
        self.accept_button = QPushButton("Accept")
        self.reject_button = QPushButton("Reject")
        self.reset_button = QPushButton("Unreview")
        self.accept_button.setToolTip("Confirm the finding as real")
        self.reject_button.setToolTip("Mark the finding as a false detection")
        self.message = QLabel("")
        self.message.setWordWrap(True)
        buttons = QHBoxLayout()
        for b, status in ((self.accept_button, "accepted"), (self.reject_button, "rejected"),
                          (self.reset_button, "unreviewed")):
            buttons.addWidget(b)
            b.clicked.connect(lambda _=False, s=status: self._emit(s))
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self.target)
        lay.addWidget(self.note)
        lay.addWidget(self.reviewer)
        lay.addLayout(buttons)
        lay.addWidget(self.message)
        self.set_target(None)

    def set_target(self, defect_id: int | None, note: str = "") -> None:
        enabled = defect_id is not None
        for b in (self.accept_button, self.reject_button, self.reset_button):
            b.setEnabled(enabled)
        self.target.setText(f"Verdict for finding {defect_id}" if enabled else "no finding selected")
        self.note.setText(note)

    def _emit(self, status: str) -> None:
        self.verdict.emit(status, self.note.text(), self.reviewer.text())


class ReviewPanel(QWidget):
    """Dock widget: table, detail card and verdict buttons for the run open in the viewer."""

    def __init__(self, napari_viewer: napari.viewer.Viewer, parent: QWidget | None = None):
        super().__init__(parent)
        self.viewer = napari_viewer
        self.view: dict | None = None
        self.current_id: int | None = None
        self.run_label = QLabel("no crackstack run open")
        self.run_label.setWordWrap(True)
        self.defect_table = DefectTable()
        self.detail = CrackDetail()
        self.controls = ReviewControls()
        split = QSplitter(Qt.Orientation.Vertical)
        split.addWidget(self.defect_table)
        split.addWidget(self.detail)
        lay = QVBoxLayout(self)
        lay.addWidget(self.run_label)
        lay.addWidget(split, 1)
        lay.addWidget(self.controls)
        self.defect_table.defect_selected.connect(self.select_defect)
        self.controls.verdict.connect(self.record_verdict)
        self.viewer.layers.events.inserted.connect(self._on_layers_changed)
        self.detail.show_defect(None)
        self._on_layers_changed()

    # -- run -----------------------------------------------------------------------------------
    def _run_root_in_viewer(self) -> str | None:
        for layer in self.viewer.layers:
            root = layer.metadata.get(RUN_KEY)
            if root:
                return root
        return None

    def _on_layers_changed(self, event: Any = None) -> None:
        # a newly inserted run layer names the run to show; at start, any run layer does
        layer = getattr(event, "value", None)
        root = layer.metadata.get(RUN_KEY) if layer is not None else self._run_root_in_viewer()
        if root and (self.view is None or str(self.view["root"]) != root):
            self.load_run(root)

    def load_run(self, run_root: str) -> None:
        """(Re)read the run's findings, reviews and assessment and refill the table."""
        try:
            self.view = review.load_run_for_view(run_root)
        except InputError as exc:
            self._tell(str(exc), error=True)
            return
        n = len(self.view["rows"])
        self.run_label.setText(f"Run {self.view['root']}: {n} findings"
                               + ("" if self.view["assessment"] else " (not assessed)"))
        self.defect_table.set_rows(self.view["rows"])
        labels = self._labels_layer()
        if labels is not None and self._on_canvas_click not in labels.mouse_drag_callbacks:
            labels.mouse_drag_callbacks.append(self._on_canvas_click)

    def _labels_layer(self):
        root = str(self.view["root"]) if self.view else None
        for layer in self.viewer.layers:
            if layer.metadata.get(RUN_KEY) == root and layer.__class__.__name__ == "Labels":
                return layer
        return None

    # -- selection -----------------------------------------------------------------------------
    def select_defect(self, defect_id: int) -> None:
        """Centre the camera on a finding, highlight its label and show its detail card."""
        if self.view is None:
            return
        row = next((r for r in self.view["rows"] if r["id"] == int(defect_id)), None)
        if row is None:
            return
        self.current_id = int(defect_id)
        if row["center_um"] is not None:
            x, y, z = row["center_um"]
            world = (z, y, x)
            for axis, value in enumerate(world):  # the slider axes go to the finding's slice
                self.viewer.dims.set_point(axis, value)
            # the camera lives in the displayed axes, in their on-screen order
            _camera(self.viewer).center = tuple(world[d] for d in self.viewer.dims.displayed)
        labels = self._labels_layer()
        if labels is not None:
            labels.selected_label = int(defect_id)
            labels.show_selected_label = True
        detail = review.crack_detail(self.view, defect_id)
        self.detail.show_defect(detail)
        self.controls.set_target(self.current_id, detail["defect"].get("review", {}).get("note", ""))
        if self.defect_table.selected_id() != self.current_id:
            self.defect_table.select_id(self.current_id, emit=False)

    def pick_at(self, position_world: tuple[float, ...], *, view_direction=None,
                dims_displayed=None) -> int | None:
        """Select the finding whose label lies under a world position (z, y, x in um), as a
        click on the canvas does; returns its id, or None over background."""
        labels = self._labels_layer()
        if labels is None or self.view is None:
            return None
        value = labels.get_value(
            position_world,
            view_direction=view_direction,
            dims_displayed=list(dims_displayed) if dims_displayed is not None else None,
            world=True,
        )
        if isinstance(value, tuple):  # multiscale layers answer (level, value)
            value = value[-1]
        if value is None or int(value) == 0:
            return None
        if not any(r["id"] == int(value) for r in self.view["rows"]):
            return None
        self.select_defect(int(value))
        return int(value)

    def _on_canvas_click(self, layer: Any, event: Any) -> None:
        # napari calls mouse callbacks with the layer and the event (position in world units)
        self.pick_at(tuple(event.position), view_direction=getattr(event, "view_direction", None),
                     dims_displayed=getattr(event, "dims_displayed", None))

    # -- review --------------------------------------------------------------------------------
    def record_verdict(self, status: str, note: str, reviewer: str) -> None:
        """Write a verdict for the selected finding to the run folder and refresh the views."""
        if self.view is None or self.current_id is None:
            return
        try:
            review.apply_review(self.view["root"], self.current_id, status, note, reviewer or None)
        except (InputError, OSError) as exc:
            self._tell(f"verdict not saved: {exc}", error=True)
            return
        self.load_run(str(self.view["root"]))
        self.select_defect(self.current_id)
        self._tell(f"finding {self.current_id}: {status} (saved to defects.json)")

    def _tell(self, text: str, *, error: bool = False) -> None:
        self.controls.message.setText(text)
        try:
            from napari.utils.notifications import show_error, show_info
        except ImportError:  # pragma: no cover - napari is what hosts this widget
            return
        (show_error if error else show_info)(text)
