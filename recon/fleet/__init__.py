"""Many passes: a batch on a local pool or a Dask cluster, an SQLite archive, and trends across a season.

``run_batch`` finds every mission file under a folder, runs each pass (this process, a local process
pool, or an existing Dask distributed cluster through its scheduler) and archives each as it completes;
``build_trend`` and ``write_trend`` turn the archive of one satellite into trend.html and trend.json.

Design record (the choices, and why)
-----------------------------------
Batch
- Only the process that owns a batch opens the archive; workers run ``process_pass`` and return a
  :class:`PassRecord`. Each record is written in its own transaction as it arrives, so a killed batch
  loses only the passes that were running, and a rerun runs just those: a pass archived "ok" with the
  same input hash (SHA-256 of the mission file, every file it names and its TLE lines) is skipped
  unless ``rerun``. A pass archived as failed is tried again (its failure may have been the machine's).
- Any error in one pass becomes a failed record with its one-line message; a worker process that dies
  is detected and each pass it held is run again alone, so only the pass that kills its process fails.
- Pass ids key the archive and the report folders, so they must be unique across an archive; a repeat
  within one batch is recorded as a failure of the second file.

Archive (SQLite, schema version 1 in ``PRAGMA user_version`` and table ``meta``)
- WAL mode; every pass written in one ``BEGIN IMMEDIATE`` transaction that deletes its old rows first;
  writers wait up to 120 s for each other. SQLite's atomic commit is what makes two concurrent batches
  lose nothing and a killed one leave every pass whole or absent.
- The gyro bias is not in summary.json yet: the archive takes the median of attitude.csv's bias
  columns, with their spread (normal-consistent MAD) used as the relative weight. The misalignment and
  time offset are archived when the summary carries them, NULL otherwise. The crosstalk archived is the
  one applied (the combined estimate when present).

Trend (per parameter; rates per Julian year from the middle of the first archived pass)
- Test: weighted least-squares line, weights 1/sigma^2; the slope's error scaled by the Birge ratio
  sqrt(chi2/(n-2)) (either way: the per-pass sigmas carry model floors); two-sided Student t test of a
  zero slope with n-2 degrees of freedom. Its false-alarm rate is exactly alpha when the per-pass
  errors are independent Gaussians whose sigmas are right up to one common factor. Figures without a
  sigma (latency, accuracy figures) get ordinary least squares, the same test.
- alpha = 0.001 per parameter; a page tests about 30 parameters, so the Bonferroni bound on any
  significant trend on a page with no drift is about 3 %; the page states the exact count and bound.
- ``drift_detected`` needs the trend significant *and* its rate at least the family's threshold per
  year (``[trend]`` section of a fleet file; defaults and reasons in :mod:`recon.fleet.settings`: bias
  100 nT, soft iron 0.002, misalignment 0.1 deg, crosstalk 800 nT/A (each about the 100 nT the field
  model leaves out), dipole per amp 5 % of its level, gyro bias 0.05 deg/s, latency 0.1 s, accuracy
  0.5 deg and 0.01 deg/s).
- A parameter with fewer than 5 passes is untestable (at most 2 degrees of freedom). Anomalies are
  counted per ISO week; a code seen in two or more weeks is recurring.
"""

from .archive import ANY_SATELLITE, BUSY_TIMEOUT_S, PASS_COLUMNS, SCHEMA_VERSION, Archive
from .batch import DEFAULT_ARCHIVE, BatchResult, record_line, run_batch
from .catalogue import FAMILIES, PARAMETERS, AnomalyRecord, Measurement, Parameter, PassRecord
from .discover import PassTask, find_missions, input_hash, plan_pass
from .linefit import LineFit, fit_line
from .settings import TrendSettings, load_fleet_file
from .trend import ParameterTrend, TrendReport, WeeklyAnomalies, build_trend
from .trendfigures import trend_figures
from .trendjson import trend_summary
from .trendpage import render_trend_html, write_trend
from .worker import process_pass

__all__ = [
    "run_batch", "BatchResult", "record_line", "DEFAULT_ARCHIVE",
    "Archive", "SCHEMA_VERSION", "BUSY_TIMEOUT_S", "PASS_COLUMNS", "ANY_SATELLITE",
    "PassRecord", "Measurement", "AnomalyRecord", "Parameter", "PARAMETERS", "FAMILIES",
    "PassTask", "find_missions", "input_hash", "plan_pass", "process_pass",
    "LineFit", "fit_line", "TrendSettings", "load_fleet_file",
    "TrendReport", "ParameterTrend", "WeeklyAnomalies", "build_trend", "trend_summary", "trend_figures",
    "render_trend_html", "write_trend",
]
