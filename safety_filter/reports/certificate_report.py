"""The engineer's report of a certification: a terminal table, an HTML page with plots, JSON.

:func:`format_joint_table` renders what
:func:`safety_filter.certification.certify.certify_with_evidence`
found as a plain-text table (one row per joint, then the verdict and the evidence).
:func:`write_report` writes a folder with ``certificate_report.html`` (self-contained: our
own CSS, no external URLs, plots as PNG files next to it), ``certificate_report.json`` for
machines, and the plots:

* per joint, the ratio ``psi / alpha2(b)`` over the joint's slice of the safe set, whose
  largest value is ``beta*`` (docs/method.md);
* per joint, the safe set in the ``(q, v)`` plane with the position limits, the rated and the
  certified velocity bounds and the falsifier's lowest-slack states;
* one summary bar chart of the acceleration authority against the sampled-data margin.

The rows and text are in :mod:`~safety_filter.reports.certificate_tables`, the plots in
:mod:`~safety_filter.reports.certificate_plots` (Matplotlib is imported only when plots are
drawn, with the Agg canvas, so the caller's pyplot backend is left alone) and the page in
:mod:`~safety_filter.reports.certificate_page`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from safety_filter.certification.certify import CertificationOutcome
from safety_filter.core.robot_model import RobotModel
from safety_filter.reports.certificate_page import REPORT_JSON, certificate_page
from safety_filter.reports.certificate_plots import (
    SUMMARY_PLOT,
    plot_file_names,
    plot_ratio,
    plot_safe_set,
    plot_summary,
)
from safety_filter.reports.certificate_tables import (  # noqa: F401 (the report's text)
    design_lines,
    dissipation_line,
    format_joint_table,
    format_model_error_table,
    joint_rows,
)
from safety_filter.reports.html_kit import SAFETY_NOTICE, json_ready, write_json  # noqa: F401

REPORT_HTML = 'certificate_report.html'


def report_data(outcome: CertificationOutcome, model: RobotModel) -> dict[str, Any]:
    """The machine-readable report: certificate summary, per-joint rows, timings, falsifier."""
    falsifier = outcome.falsifier
    falsifier_summary = None
    if falsifier is not None:
        falsifier_summary = dict(falsifier.summary())
        falsifier_summary['worst_states'] = list(falsifier.worst_states)
    return json_ready({
        'robot': model.name,
        'verdict': 'certified' if outcome.certified else 'not certified',
        'certificate': outcome.certificate.summary(),
        'joints': joint_rows(outcome, model),
        'velocity_scale': outcome.velocity_scale,
        'authority_by_condition': outcome.authority_by_condition,
        'stage_seconds': outcome.stage_seconds,
        'falsifier': falsifier_summary,
    })


def write_report(outcome: CertificationOutcome, model: RobotModel, folder: str | Path
                 ) -> Path:
    """Write the report folder; returns the path of ``certificate_report.html``.

    The folder receives the HTML page, ``certificate_report.json`` and the PNG plots named
    by :func:`plot_file_names`. Existing files of the same names are replaced.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    files = plot_file_names(outcome)
    for i in range(outcome.certificate.n_joints):
        plot_ratio(outcome, model, i, folder / files['ratio'][i])
        plot_safe_set(outcome, model, i, folder / files['safe_set'][i])
    plot_summary(outcome, folder / SUMMARY_PLOT)
    data = report_data(outcome, model)
    write_json(folder / REPORT_JSON, data)
    path = folder / REPORT_HTML
    path.write_text(certificate_page(outcome, model, files), encoding='utf-8')
    return path
