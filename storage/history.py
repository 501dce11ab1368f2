"""The SQLite history: the commit log of ingested draws and every score the service computed.

The history is a plain SQLite file (WAL journal) written by one service process and read by any
number of viewers (the terminal UI, the CLI, or any SQLite tool) at the same time.
``HistoryWriter(path)`` opens or creates it for writing (the service); ``HistoryReader(path)`` opens
an existing file through a ``file:...?mode=ro`` URI and never writes (the CLI and the screen).
``History(path, readonly=False)`` returns one or the other.  Both set a busy timeout, so a reader
never fails while the writer commits.  The ``snapshots`` columns are declared once, in
``SNAPSHOT_COLUMNS``; the DDL, the field list and the JSON and CSV records are made from it.

All times are unix seconds (REAL).  JSON columns hold JSON text; the read methods return them parsed.
Non-finite numbers inside JSON (NaN, infinity) are stored as null.

Tables and columns
------------------
``meta``: key TEXT PK, value TEXT.  ``schema_version`` is the version of this layout (``SCHEMA_VERSION``);
    ``created`` the unix time the file was created; ``snapshots_thinned:<run>`` the seq up to which
    the run's snapshot rows were thinned.  A newer layout adds a migration step.

``runs``: one row per run (model fit); the run's folder name is its name.
    name TEXT PK; folder TEXT (run folder path); title TEXT; dataset TEXT (runs with the same dataset
    and n are compared); n_obs INTEGER (observations n); n_params INTEGER (parameter count used by
    AIC); point_loglik REAL (log-likelihood at a supplied point estimate, for DIC/AIC; null if none);
    labels TEXT (JSON list of observation labels, or null); targets TEXT (JSON object of verdict
    targets overriding the defaults); state TEXT ('gathering' | 'enough' | 'needs_a_look' |
    'set_aside' | 'paused' | 'finished', derived by ``chainvigil.rules.run_state``; the words the
    screen shows; files of version 6 and older held 'collecting', 'settled', 'attention' for the
    first three, rewritten by the version-7 step); first_seen REAL; updated REAL (last
    write about the run); enough_at REAL (time the verdict first said enough; null until then);
    state_reason TEXT (why the run is set aside; null otherwise; added in version 2); read_options
    TEXT (JSON object {"loglik", "warmup", "thin", "params", "ignore"}: the read options the run's
    draws were read with, fixed once its first draws are stored; null before; added in version 3);
    refit_of TEXT (the run a refit run belongs to; null for an ordinary run), fold INTEGER (its
    K-fold fold; added in version 5).

``chains``: one row per chain.  run TEXT, chain TEXT, PK (run, chain); kind TEXT ('csv' | 'npz');
    param_names TEXT (JSON list); header TEXT (the CSV header line, null for NPZ); draws INTEGER
    (committed draws: what the draw store is cut back to on start; warm-up draws included); warmup
    INTEGER (how many of those committed draws, at the start of the chain, are warm-up: stored but
    left out of every score and mixing figure; added in version 3).

``manifest``: the commit log, one row per ingested piece, written after the draws are durable.
    id INTEGER PK; run TEXT; chain TEXT; source TEXT (CSV file or NPZ chunk path relative to the run
    folder); offset INTEGER (CSV byte offset just after the committed lines; null for NPZ); chunk TEXT
    (NPZ chunk name; null for CSV); draws_added INTEGER; draws_after INTEGER (chain length after this
    commit); time REAL; position INTEGER (draws of the chain passed after this piece: warm-up and
    thinned-out draws counted, refused rows not; null in rows from before version 3); last_draw
    INTEGER (highest draw number accepted in the chain so far; null when the input has no draw
    numbers).  A reader resumes from the newest row's offset or chunk, position and last_draw, so
    warm-up, thinning and the draw-order check go on across restarts.

``sources``: what each committed input file was when it was committed (its identity), so a file
    rewritten behind the service's back is recognised.  run TEXT, chain TEXT (the chain in the store,
    ``<chain>~2`` ... for a later segment of one input chain), file TEXT (CSV file or NPZ chunk path
    relative to the run folder), PK (run, chain, file); origin TEXT (the chain name of the input
    file); dev, ino, size, mtime_ns INTEGER (``os.stat`` at commit; size is the committed byte
    offset for a CSV); head, tail TEXT (CSV: SHA-256 of the first and the last up to 4 KiB of the
    committed bytes); digest TEXT (NPZ: SHA-256 of the chunk's zip directory: member names, sizes and
    CRC-32s, which the reader checks against the data).  Written in the same transaction as the
    manifest row.  Created on open when missing (no schema version change: older files gain the
    empty table).

``snapshots``: one row per score update of a run.  id INTEGER PK; run TEXT; seq INTEGER (1, 2, ...
    per run); time REAL; chains INTEGER; draws INTEGER (total over chains); draws_per_chain INTEGER
    (smallest chain); draw_rate REAL (draws per chain per second); r_eff_mean REAL (mean relative
    efficiency used by PSIS-LOO); loo_elpd, loo_se, loo_mcse, loo_p_eff REAL (PSIS-LOO expected log
    predictive density, its standard error, Monte Carlo standard error, effective parameters);
    waic_elpd, waic_se, waic_p_eff REAL; dic_elpd, dic_p_eff REAL; aic_elpd, aic_p_eff REAL (null
    when unavailable); k_max REAL (largest Pareto k-hat); k_threshold REAL (sample-size dependent
    k-hat threshold); k_above INTEGER (observations above it); rhat_max, ess_bulk_min, ess_tail_min
    REAL (worst parameter; null when the run has no parameters); enough INTEGER (0/1); verdict TEXT
    (JSON: {"enough": bool, "checks": [{"name", "ok", "value", "target", "more_draws", "minutes",
    "note"}]}); loo_method TEXT ('psis' | 'mixed' | 'kfold' | 'refit'), loo_exact, loo_pending,
    loo_psis INTEGER (observations exact / waiting for a refit / PSIS), loo_psis_elpd REAL (plain
    PSIS-LOO elpd beside the combined headline) (added in version 5); r_eff_source TEXT, joint_pass
    INTEGER (added in version 6); retention_note TEXT (what ``--keep-draws tail``/``none`` made
    approximate; null when nothing) (added in version 8); mixing_draws INTEGER (draws per chain the
    mixing figures cover; added in version 9); loo_subsample_m, loo_subsample_n INTEGER,
    loo_se_subsample REAL (a run scored from a random subsample: m of n observations with an exact
    PSIS-LOO value, and the standard error of loo_elpd due to the subsample alone, not in loo_mcse;
    null for a run scored over every observation) (added in version 10); loo_lagged INTEGER
    (observations whose PSIS-LOO value came from a tail fit within ``--tail-lag`` of current, not
    refitted for this snapshot; 0: every tail current; null: a scorer without a tail cache) (added
    in version 11).  Old rows are thinned
    (``HistoryWriter._thin_snapshots``, ``SNAPSHOT_RECENT``).

``mixing``: per-parameter figures at a snapshot.  snapshot_id INTEGER; run TEXT; param TEXT;
    mean, mcse (Monte Carlo standard error of the mean), rhat, ess_bulk, ess_tail REAL.  Added in
    version 3: sd REAL (posterior standard deviation over all retained draws, ddof 1); q05, q95 REAL
    (5% and 95% quantiles: a central 90% interval, linear interpolation); chain_means, chain_sds TEXT
    (JSON lists, one value per chain, chains in the order of their names); more_draws INTEGER (draws
    per chain this parameter still needs for its two ESS goals, ESS taken to grow in proportion to
    the draws; 0 when both are met; null when there is no basis, e.g. ESS not defined; R-hat is
    never projected per parameter).  Rows written before version 3 hold null there.

``pointwise_latest``: the newest per-observation values of each run.  run TEXT, obs INTEGER (0-based),
    PK (run, obs); label TEXT; elpd_loo REAL; elpd_waic REAL; k_hat REAL (Pareto shape estimate);
    snapshot_id INTEGER (snapshot these values belong to); loo_source TEXT (where elpd_loo comes from:
    'psis' | 'pending' | 'exact' | 'kfold'; added in version 3).  A subsampled run (version 10) has
    rows for its sampled observations only (``obs`` says which).

``pointwise_history``: the same values kept for a geometrically thinned set of snapshots: the first,
    the latest, any written with ``keep_pointwise=True`` (``pinned`` = 1), and a chain of snapshots each
    at least ``POINTWISE_SPACING`` (1.25) times the draws per chain of the previous kept one, so the
    table holds O(log draws) snapshots.  snapshot_id INTEGER; run TEXT; obs INTEGER; elpd_loo REAL;
    k_hat REAL; pinned INTEGER (added in version 3).

``service``: one row (id = 1) about the service process that writes this file: pid INTEGER; started,
    heartbeat (renewed every pass), stopped_at (clean stop), crashed_at REAL (added in version 3).
    A reader shows the service as live only while the heartbeat is fresh.

``comparisons``: model comparison passes over runs of the same dataset.  id INTEGER PK; round INTEGER
    (one per comparison pass); time REAL; dataset TEXT; run TEXT; rank INTEGER (1 = best); elpd REAL;
    delta REAL (elpd - best elpd, <= 0); se_delta REAL (standard error of delta); mcse_delta REAL
    (Monte Carlo standard error of delta); weight REAL (stacking weight); caution INTEGER (1 when the
    standard error of delta is likely optimistic: |delta| < 4 or n < 100); may_flip INTEGER (1 when
    more draws could still change the order: |delta| < 2 * mcse_delta).

``comparison_pairs``: every pair of runs of a comparison round (added in version 3), written in the
    same transaction as the round's ``comparisons`` rows.  round INTEGER (the ``comparisons`` round);
    time REAL; dataset TEXT; run_a TEXT, run_b TEXT (one row per unordered pair; run_a comes before
    run_b in the round's order, i.e. has the larger or equal elpd); delta REAL (elpd(run_a) -
    elpd(run_b), >= 0); se_delta REAL; mcse_delta REAL; caution INTEGER; may_flip INTEGER (the rules
    of ``comparisons``, applied to this pair).

``events``: things worth telling the user.  id INTEGER PK; time REAL; run TEXT (nullable); file TEXT
    (nullable); level TEXT ('info' | 'warning' | 'error'); kind TEXT (e.g. 'rejected_input',
    'bad_values', 'enough', 'rebuild', 'run_appeared', 'run_vanished'); message TEXT.
"""

from __future__ import annotations

import json
import math
import sqlite3
import time as _time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["HistoryReader", "HistoryWriter", "History", "SCHEMA_VERSION", "SNAPSHOT_COLUMNS",
           "SNAPSHOT_FIELDS", "RUN_STATES", "EVENT_LEVELS", "JSON_SCHEMA", "snapshot_record",
           "csv_columns", "csv_row"]

# ---- schema version: the ONE place it is set (each bump adds a step to MIGRATIONS below) ----
SCHEMA_VERSION = 11
BUSY_TIMEOUT_MS = 30_000
#: Stored run states; ``chainvigil.rules.run_state`` derives them (one function); the screen shows these
#: very words (an underscore shown as a space), with a glyph and a colour of its own.
RUN_STATES = ("gathering", "enough", "needs_a_look", "set_aside", "paused", "finished")
EVENT_LEVELS = ("info", "warning", "error")
#: Version of the published JSON records (``history --json`` and ``score --json``).
JSON_SCHEMA = 1


@dataclass(frozen=True)
class Column:
    """One snapshot column: the single spec the DDL, the field list, the JSON and CSV records use.

    name        SQL column name (also the CSV header and the snapshot row builder's key)
    sql         SQLite type
    description what it holds (docs/interfaces.md lists these)
    json        path of the value in the JSON record (the same keys as ``score --json``)
    decimals    CSV rounding: decimal places (None: as stored)
    significant CSV rounding: significant digits (None: as stored)
    """

    name: str
    sql: str
    description: str
    json: tuple
    decimals: int | None = None
    significant: int | None = None


SNAPSHOT_COLUMNS = (
    Column("time", "REAL", "unix time of the snapshot", ("time",)),
    Column("chains", "INTEGER", "number of chains", ("chains",)),
    Column("draws", "INTEGER", "draws in all (total over chains), after warm-up", ("draws",)),
    Column("draws_per_chain", "INTEGER", "draws of the shortest chain, after warm-up", ("draws_per_chain",)),
    Column("draw_rate", "REAL", "draws per chain per second", ("draw_rate",), significant=3),
    Column("r_eff_mean", "REAL", "mean relative efficiency used by PSIS-LOO", ("r_eff_mean",), decimals=3),
    Column("r_eff_source", "TEXT", "which r_eff PSIS-LOO used: 'streaming' (batch means, updated as "
           "draws arrive); null when the scorer keeps no streaming r_eff (PSIS-LOO then used r_eff = 1)",
           ("r_eff_source",)),
    Column("joint_pass", "INTEGER", "draws per chain of the store pass whose joint/independent MCSE "
           "ratio loo_mcse uses (null before the first pass)", ("joint_pass",)),
    Column("loo_elpd", "REAL", "PSIS-LOO expected log predictive density", ("loo", "elpd"), decimals=2),
    Column("loo_se", "REAL", "its standard error", ("loo", "se"), decimals=2),
    Column("loo_mcse", "REAL", "its Monte Carlo standard error", ("loo", "mcse"), significant=3),
    Column("loo_p_eff", "REAL", "PSIS-LOO effective number of parameters", ("loo", "p_eff"), decimals=2),
    Column("waic_elpd", "REAL", "WAIC expected log predictive density", ("waic", "elpd"), decimals=2),
    Column("waic_se", "REAL", "its standard error", ("waic", "se"), decimals=2),
    Column("waic_p_eff", "REAL", "WAIC effective number of parameters", ("waic", "p_eff"), decimals=2),
    Column("dic_elpd", "REAL", "DIC on the elpd scale", ("dic", "elpd"), decimals=2),
    Column("dic_p_eff", "REAL", "DIC effective number of parameters", ("dic", "p_eff"), decimals=2),
    Column("aic_elpd", "REAL", "AIC on the elpd scale (null without a point estimate)", ("aic", "elpd"),
           decimals=2),
    Column("aic_p_eff", "REAL", "parameter count used by AIC", ("aic", "p_eff"), decimals=2),
    Column("k_max", "REAL", "largest Pareto k-hat", ("pareto_k", "max"), decimals=2),
    Column("k_threshold", "REAL", "sample-size k-hat threshold min(1 - 1/log10 S, 0.7)",
           ("pareto_k", "threshold"), decimals=3),
    Column("k_above", "INTEGER", "count of observations above the threshold", ("pareto_k", "above")),
    Column("rhat_max", "REAL", "worst split R-hat (null without parameters)", ("mixing", "rhat_max"),
           decimals=4),
    Column("ess_bulk_min", "REAL", "smallest bulk-ESS", ("mixing", "ess_bulk_min"), decimals=0),
    Column("ess_tail_min", "REAL", "smallest tail-ESS", ("mixing", "ess_tail_min"), decimals=0),
    Column("enough", "INTEGER", "1 when the verdict says enough draws", ("enough",)),
    Column("verdict", "TEXT", "the verdict as JSON (see docs/verdict.md)", ("verdict",)),
    # added in version 3 (refits): how the headline loo_* values were made
    Column("loo_method", "TEXT", "how loo_elpd was made: 'psis', 'mixed' (exact refits + PSIS) or 'kfold'",
           ("loo", "method")),
    Column("loo_exact", "INTEGER", "observations whose elpd comes from a finished refit",
           ("loo", "exact_observations")),
    Column("loo_pending", "INTEGER", "flagged observations waiting for a finished refit (PSIS value used)",
           ("loo", "pending_observations")),
    Column("loo_psis", "INTEGER", "observations whose elpd is the PSIS-LOO value (pending ones included)",
           ("loo", "psis_observations")),
    Column("loo_psis_elpd", "REAL", "plain PSIS-LOO elpd, kept beside the combined headline",
           ("loo", "psis_elpd"), decimals=2),
    Column("retention_note", "TEXT", "what --keep-draws tail/none made approximate in this snapshot (a PSIS "
           "tail buffer too small, a joint MCSE from a window or unavailable); null when nothing",
           ("retention_note",)),
    # added in version 9: mixing is recomputed on a schedule of draws (docs/verdict.md)
    Column("mixing_draws", "INTEGER", "draws per chain the R-hat, ESS and MCSE figures (rhat_max, "
           "ess_bulk_min, ess_tail_min, the mixing rows) cover; null without parameters",
           ("mixing", "draws_per_chain")),
    # added in version 10 (subsampled scoring): null for a run scored over every observation
    Column("loo_subsample_m", "INTEGER", "observations with an exact PSIS-LOO value when loo_elpd was "
           "estimated from a random subsample (null: every observation)", ("loo", "subsampled", "m")),
    Column("loo_subsample_n", "INTEGER", "observations of the run when loo_elpd was estimated from a "
           "subsample", ("loo", "subsampled", "n")),
    Column("loo_se_subsample", "REAL", "standard error of loo_elpd due to the subsample alone (0 when m "
           "= n); not in loo_mcse, which is the draws' Monte Carlo error", ("loo", "subsampled", "se_subsample"), significant=3),
    # added in version 11: the tail lag of live snapshots (docs/numerics.md, "Tail lag")
    Column("loo_lagged", "INTEGER", "observations whose PSIS-LOO value came from a tail fit within "
           "--tail-lag of current instead of a refit (0: every tail current, as in the final snapshot "
           "of a clean stop; null: a scorer without a tail cache)", ("loo", "lagged_observations")),
)
_V10_SNAPSHOT_COLUMNS = ("loo_subsample_m", "loo_subsample_n", "loo_se_subsample")
SNAPSHOT_FIELDS = tuple(c.name for c in SNAPSHOT_COLUMNS)
_SNAPSHOT_SQL = ", ".join(f"{c.name} {c.sql}" for c in SNAPSHOT_COLUMNS)

_DDL = f"""
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT);
CREATE TABLE IF NOT EXISTS runs (
    name TEXT PRIMARY KEY, folder TEXT, title TEXT, dataset TEXT, n_obs INTEGER, n_params INTEGER,
    point_loglik REAL, labels TEXT, targets TEXT, state TEXT, first_seen REAL, updated REAL,
    enough_at REAL, state_reason TEXT, read_options TEXT, refit_of TEXT, fold INTEGER);
CREATE TABLE IF NOT EXISTS chains (
    run TEXT NOT NULL, chain TEXT NOT NULL, kind TEXT, param_names TEXT, header TEXT,
    draws INTEGER NOT NULL DEFAULT 0, warmup INTEGER NOT NULL DEFAULT 0, PRIMARY KEY (run, chain));
CREATE TABLE IF NOT EXISTS manifest (
    id INTEGER PRIMARY KEY, run TEXT NOT NULL, chain TEXT NOT NULL, source TEXT, "offset" INTEGER,
    chunk TEXT, draws_added INTEGER, draws_after INTEGER, time REAL, position INTEGER,
    last_draw INTEGER);
CREATE INDEX IF NOT EXISTS manifest_run_chain ON manifest (run, chain);
CREATE TABLE IF NOT EXISTS snapshots (
    id INTEGER PRIMARY KEY, run TEXT NOT NULL, seq INTEGER NOT NULL, {_SNAPSHOT_SQL});
CREATE UNIQUE INDEX IF NOT EXISTS snapshots_run_seq ON snapshots (run, seq);
CREATE TABLE IF NOT EXISTS mixing (
    snapshot_id INTEGER NOT NULL, run TEXT, param TEXT, mean REAL, mcse REAL, rhat REAL,
    ess_bulk REAL, ess_tail REAL, sd REAL, q05 REAL, q95 REAL, chain_means TEXT, chain_sds TEXT,
    more_draws INTEGER);
CREATE INDEX IF NOT EXISTS mixing_snapshot ON mixing (snapshot_id);
CREATE TABLE IF NOT EXISTS pointwise_latest (
    run TEXT NOT NULL, obs INTEGER NOT NULL, label TEXT, elpd_loo REAL, elpd_waic REAL, k_hat REAL,
    snapshot_id INTEGER, loo_source TEXT, PRIMARY KEY (run, obs));
CREATE TABLE IF NOT EXISTS pointwise_history (
    snapshot_id INTEGER NOT NULL, run TEXT NOT NULL, obs INTEGER NOT NULL, elpd_loo REAL,
    k_hat REAL, pinned INTEGER);
CREATE INDEX IF NOT EXISTS pointwise_history_run ON pointwise_history (run, snapshot_id, obs);
CREATE TABLE IF NOT EXISTS comparisons (
    id INTEGER PRIMARY KEY, round INTEGER NOT NULL, time REAL, dataset TEXT, run TEXT, rank INTEGER,
    elpd REAL, delta REAL, se_delta REAL, mcse_delta REAL, weight REAL, caution INTEGER,
    may_flip INTEGER);
CREATE INDEX IF NOT EXISTS comparisons_dataset ON comparisons (dataset, round);
CREATE TABLE IF NOT EXISTS comparison_pairs (
    round INTEGER NOT NULL, time REAL, dataset TEXT, run_a TEXT, run_b TEXT, delta REAL,
    se_delta REAL, mcse_delta REAL, caution INTEGER, may_flip INTEGER);
CREATE INDEX IF NOT EXISTS comparison_pairs_round ON comparison_pairs (round);
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY, time REAL, run TEXT, file TEXT, level TEXT, kind TEXT, message TEXT);
CREATE INDEX IF NOT EXISTS events_run ON events (run, id);
CREATE TABLE IF NOT EXISTS service (
    id INTEGER PRIMARY KEY CHECK (id = 1), pid INTEGER, started REAL, heartbeat REAL, stopped_at REAL,
    crashed_at REAL);
"""

# Created on every open when missing (idempotent), so history files of version 2 gain it too.
_SOURCES_DDL = """
CREATE TABLE IF NOT EXISTS sources (
    run TEXT NOT NULL, chain TEXT NOT NULL, file TEXT NOT NULL, origin TEXT, dev INTEGER,
    ino INTEGER, size INTEGER, mtime_ns INTEGER, head TEXT, tail TEXT, digest TEXT,
    PRIMARY KEY (run, chain, file))
"""
SOURCE_FIELDS = ("origin", "dev", "ino", "size", "mtime_ns", "head", "tail", "digest")


def _add_column(conn: sqlite3.Connection, table: str, column: str) -> None:
    """``ALTER TABLE table ADD COLUMN column`` unless the column is there already (a step that ran
    before a kill, or a file written by a newer step) or the table is missing (the DDL run after
    the migrations creates it whole)."""
    name = column.split()[0]
    present = {row[1] for row in conn.execute(f"PRAGMA table_info({table})")}
    if present and name not in present:
        conn.execute(f"ALTER TABLE {table} ADD COLUMN {column}")


def _migrate_1_to_2(conn: sqlite3.Connection) -> None:
    """Version 2: runs.state_reason (why a run was set aside)."""
    _add_column(conn, "runs", "state_reason TEXT")


def _migrate_2_to_3(conn: sqlite3.Connection) -> None:
    """Version 3: the read options of a run, the warm-up count of a chain, and the reader position
    and last draw number committed with each piece (rows from before stay null: read with the default
    options, no warm-up, no thinning, so a chain's position is its committed draw count)."""
    _add_column(conn, "runs", "read_options TEXT")
    _add_column(conn, "chains", "warmup INTEGER NOT NULL DEFAULT 0")
    _add_column(conn, "manifest", "position INTEGER")
    _add_column(conn, "manifest", "last_draw INTEGER")


def _migrate_3_to_4(conn: sqlite3.Connection) -> None:
    """Version 4: mixing spread, interval, per-chain figures and projection; comparison_pairs."""
    for column in ("sd REAL", "q05 REAL", "q95 REAL", "chain_means TEXT", "chain_sds TEXT",
                   "more_draws INTEGER"):
        _add_column(conn, "mixing", column)
    conn.execute("CREATE TABLE IF NOT EXISTS comparison_pairs (round INTEGER NOT NULL, time REAL, "
                 "dataset TEXT, run_a TEXT, run_b TEXT, delta REAL, se_delta REAL, mcse_delta REAL, "
                 "caution INTEGER, may_flip INTEGER)")
    conn.execute("CREATE INDEX IF NOT EXISTS comparison_pairs_round ON comparison_pairs (round)")


def _migrate_4_to_5(conn: sqlite3.Connection) -> None:
    """Version 5 (refits): runs.refit_of, runs.fold; the snapshot columns loo_method, loo_exact,
    loo_pending, loo_psis, loo_psis_elpd; pointwise_latest.loo_source."""
    _add_column(conn, "runs", "refit_of TEXT")
    _add_column(conn, "runs", "fold INTEGER")
    for column in SNAPSHOT_COLUMNS:
        if column.name in _V5_SNAPSHOT_COLUMNS:
            _add_column(conn, "snapshots", f"{column.name} {column.sql}")
    _add_column(conn, "pointwise_latest", "loo_source TEXT")


_V5_SNAPSHOT_COLUMNS = ("loo_method", "loo_exact", "loo_pending", "loo_psis", "loo_psis_elpd")


def _migrate_5_to_6(conn: sqlite3.Connection) -> None:
    """Version 6: which r_eff and which joint-MCSE pass a snapshot used; pinned pointwise history
    rows (kept through thinning); the ``service`` liveness row."""
    _add_column(conn, "snapshots", "r_eff_source TEXT")
    _add_column(conn, "snapshots", "joint_pass INTEGER")
    _add_column(conn, "pointwise_history", "pinned INTEGER")
    conn.execute("CREATE TABLE IF NOT EXISTS service (id INTEGER PRIMARY KEY CHECK (id = 1), pid INTEGER, "
                 "started REAL, heartbeat REAL, stopped_at REAL, crashed_at REAL)")


#: Run states as files of version 6 and older stored them -> the word stored from version 7 on.
#: ``set_aside``, ``paused`` and ``finished`` kept their names.
_V6_STATE_WORDS = {"collecting": "gathering", "settled": "enough", "attention": "needs_a_look"}


def _migrate_6_to_7(conn: sqlite3.Connection) -> None:
    """Version 7: ``runs.state`` holds the words the screen shows (one name per state; ``settled``
    also named a verdict check).  Rewrites the old words in place; a state already in the new words
    (a step that ran before a kill) is left as it is, so the step is idempotent."""
    present = {row[1] for row in conn.execute("PRAGMA table_info(runs)")}
    if "state" not in present:
        return
    for old, new in _V6_STATE_WORDS.items():
        conn.execute("UPDATE runs SET state = ? WHERE state = ?", (new, old))


def _migrate_7_to_8(conn: sqlite3.Connection) -> None:
    """Version 8: ``snapshots.retention_note`` (what --keep-draws made approximate)."""
    _add_column(conn, "snapshots", "retention_note TEXT")


def _migrate_8_to_9(conn: sqlite3.Connection) -> None:
    """Version 9: which draws per chain a snapshot's mixing figures cover (mixing is recomputed on a
    schedule of draws, not at every snapshot)."""
    _add_column(conn, "snapshots", "mixing_draws INTEGER")


def _migrate_9_to_10(conn: sqlite3.Connection) -> None:
    """Version 10 (subsampled scoring): the snapshot columns loo_subsample_m, loo_subsample_n,
    loo_se_subsample; pointwise rows of a subsampled run cover its sampled observations only."""
    for column in SNAPSHOT_COLUMNS:
        if column.name in _V10_SNAPSHOT_COLUMNS:
            _add_column(conn, "snapshots", f"{column.name} {column.sql}")


def _migrate_10_to_11(conn: sqlite3.Connection) -> None:
    """Version 11: ``snapshots.loo_lagged`` (observations served from a lagged PSIS tail fit)."""
    _add_column(conn, "snapshots", "loo_lagged INTEGER")


# Migrations: MIGRATIONS[v] upgrades a version-v file to version v + 1 (a callable taking the
# sqlite3 connection, run inside the opening transaction).
MIGRATIONS: dict = {1: _migrate_1_to_2, 2: _migrate_2_to_3, 3: _migrate_3_to_4, 4: _migrate_4_to_5,
                     5: _migrate_5_to_6, 6: _migrate_6_to_7, 7: _migrate_7_to_8, 8: _migrate_8_to_9,
                     9: _migrate_9_to_10, 10: _migrate_10_to_11}
#: pointwise_history keeps a snapshot's values when its draws per chain are at least this factor
#: above the previous kept one (plus the first, the latest and pinned ones): O(log draws) rows.
POINTWISE_SPACING = 1.25
#: Snapshot rows (with their mixing rows) are thinned once they are older than the latest
#: SNAPSHOT_RECENT rows of their run, in batches of SNAPSHOT_THIN_BATCH rows (one batch every
#: SNAPSHOT_THIN_BATCH snapshots, so the cost per snapshot stays flat).  Kept: the first row, every
#: row whose verdict or state differs from the row before it, every row whose pointwise values are
#: kept (``pointwise_history``, ``pointwise_latest``), and a chain of rows each at least
#: SNAPSHOT_SPACING times the draws per chain of the previous kept one (O(log draws) rows).
SNAPSHOT_RECENT = 720
SNAPSHOT_THIN_BATCH = 100
SNAPSHOT_SPACING = 1.01

RUN_FIELDS = ("folder", "title", "dataset", "n_obs", "n_params", "point_loglik", "labels", "targets",
              "state", "first_seen", "updated", "enough_at", "state_reason", "read_options", "refit_of",
              "fold")
CHAIN_FIELDS = ("kind", "param_names", "header", "draws", "warmup")
MIXING_FIELDS = ("param", "mean", "mcse", "rhat", "ess_bulk", "ess_tail", "sd", "q05", "q95",
                 "chain_means", "chain_sds", "more_draws")
COMPARISON_FIELDS = ("run", "rank", "elpd", "delta", "se_delta", "mcse_delta", "weight", "caution",
                     "may_flip")
PAIR_FIELDS = ("run_a", "run_b", "delta", "se_delta", "mcse_delta", "caution", "may_flip")
_JSON_COLUMNS = {"labels", "targets", "param_names", "verdict", "read_options", "chain_means", "chain_sds"}


def snapshot_record(row: dict) -> dict:
    """A snapshot row as the published JSON record of ``history --json`` (docs/interfaces.md).

    Nested with the same keys as ``score --json`` (``loo{elpd, se, mcse, p_eff}``, ``pareto_k{max,
    threshold, above}``, ...); ``mixing`` is null when the run has no parameters, ``aic`` when it has
    no point estimate.  Full precision; non-finite numbers are null.
    """
    record: dict = {"schema": JSON_SCHEMA, "run": row.get("run"), "seq": row.get("seq")}
    for column in SNAPSHOT_COLUMNS:
        target = record
        for key in column.json[:-1]:
            target = target.setdefault(key, {})
        target[column.json[-1]] = _plain(row.get(column.name))
    if all(record["mixing"].get(k) is None for k in record["mixing"]):
        record["mixing"] = None
    if record["aic"].get("elpd") is None:
        record["aic"] = None
    if record["loo"].get("subsampled", {}).get("m") is None:
        record["loo"]["subsampled"] = None  # scored over every observation
    record["enough"] = bool(record["enough"]) if record["enough"] is not None else None
    return record


def csv_columns() -> tuple:
    """Header of ``history --csv``: run, seq, the ISO 8601 UTC time, then every snapshot column but
    the verdict JSON."""
    return ("run", "seq", "time_iso", *[c.name for c in SNAPSHOT_COLUMNS if c.name != "verdict"])


def _round(value, column: Column):
    if not isinstance(value, float) or not math.isfinite(value):
        return value
    if column.decimals is not None:
        return round(value, column.decimals) if column.decimals else int(round(value))
    if column.significant is not None and value != 0:
        digits = column.significant - 1 - int(math.floor(math.log10(abs(value))))
        return round(value, digits)
    return value


def csv_row(row: dict) -> list:
    """One snapshot row for ``history --csv``: floats rounded to what the estimate supports (elpd to
    0.01, Monte Carlo errors to 3 significant digits, per ``SNAPSHOT_COLUMNS``); missing values empty."""
    t = row.get("time")
    iso = (_time.strftime("%Y-%m-%dT%H:%M:%S", _time.gmtime(t)) + f".{int((t % 1) * 1000):03d}Z"
           if isinstance(t, (int, float)) and math.isfinite(t) else "")
    out = [row.get("run"), row.get("seq"), iso]
    for column in SNAPSHOT_COLUMNS:
        if column.name == "verdict":
            continue
        value = _plain(row.get(column.name))
        out.append("" if value is None else _round(value, column))
    return out


def _plain(value):
    """Numpy scalars/arrays to Python values; non-finite floats to None (for JSON)."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_plain(v) for v in (value.tolist() if isinstance(value, np.ndarray) else value)]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _to_json(value):
    return None if value is None else json.dumps(_plain(value), allow_nan=False)


def _scalar(value):
    """A value for a plain SQL column: numpy scalars unwrapped, bools as 0/1."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, bool):
        return int(value)
    return value


class HistoryReader:
    """Read access to a chainvigil history file (see the module docstring for the schema).

    What the CLI and the screen get: read methods only.  Opens an existing file through a
    ``file:...?mode=ro`` URI, so it never writes and works while a writer process holds the file.

    Parameters
    ----------
    path : str or Path
        The SQLite file; FileNotFoundError if it does not exist, ValueError if it is not a
        chainvigil history of this version.
    """

    readonly = True

    def __init__(self, path):
        self.path = Path(path)
        if not self.path.is_file():
            raise FileNotFoundError(f"no history file at {self.path}")
        uri = self.path.resolve().as_uri() + "?mode=ro"
        self.conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_MS / 1000,
                                    check_same_thread=False)
        self.conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        try:
            self._check_version()
        except BaseException:
            self.conn.close()
            raise

    # ------------------------------------------------------------------ plumbing

    def close(self) -> None:
        self.conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def _rows(self, sql: str, params=()) -> list[dict]:
        cur = self.conn.execute(sql, params)
        keys = [d[0] for d in cur.description]
        out = []
        for row in cur.fetchall():
            d = dict(zip(keys, row))
            for k in _JSON_COLUMNS.intersection(d):
                if d[k] is not None:
                    d[k] = json.loads(d[k])
            out.append(d)
        return out

    def _one(self, sql: str, params=()) -> dict | None:
        rows = self._rows(sql, params)
        return rows[0] if rows else None

    def _schema_version(self) -> int | None:
        tables = {name for (name,) in self.conn.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table'")}
        if "meta" not in tables:
            if tables:
                raise ValueError(f"{self.path} is an SQLite file but not a chainvigil history "
                                 f"(tables: {', '.join(sorted(tables))})")
            return None
        row = self.conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        if row is None:
            raise ValueError(f"{self.path}: history has no schema_version in its meta table")
        return int(row[0])

    def _check_version(self) -> None:
        version = self._schema_version()
        if version is None:
            raise ValueError(f"{self.path} is an empty SQLite file, not a chainvigil history")
        if version > SCHEMA_VERSION:
            raise ValueError(f"{self.path}: history schema version {version} is newer than this "
                             f"chainvigil understands ({SCHEMA_VERSION})")
        if version < SCHEMA_VERSION:
            raise ValueError(f"{self.path}: history schema version {version} is older than "
                             f"{SCHEMA_VERSION}; open it once for writing to migrate it")

    def schema_version(self) -> int:
        """The schema version recorded in the file."""
        return int(self._schema_version())

    # ------------------------------------------------------------------ reads

    def runs(self) -> list[dict]:
        """Every run, by name."""
        return self._rows("SELECT * FROM runs ORDER BY name")

    def run(self, name: str) -> dict | None:
        return self._one("SELECT * FROM runs WHERE name = ?", (name,))

    def chains(self, run: str) -> list[dict]:
        """The chains of a run, by chain name."""
        return self._rows("SELECT * FROM chains WHERE run = ? ORDER BY chain", (run,))

    def committed(self, run: str, chain: str) -> dict:
        """What the commit log holds for a chain.

        Returns ``{"draws": committed draws, "offsets": {source: last committed byte offset},
        "chunks": set of committed NPZ chunk names, "warmup": committed warm-up draws, "position":
        draws of the chain passed at the newest commit (None before any, or in rows from before
        version 3), "last_draw": the highest draw number accepted by then (None if none)}``.
        """
        row = self.conn.execute("SELECT draws, warmup FROM chains WHERE run = ? AND chain = ?",
                                (run, chain)).fetchone()
        newest = self.conn.execute("SELECT position, last_draw FROM manifest WHERE run = ? AND "
                                   "chain = ? ORDER BY id DESC LIMIT 1", (run, chain)).fetchone()
        offsets = {src: off for src, off in self.conn.execute(
            'SELECT source, "offset" FROM manifest WHERE id IN (SELECT MAX(id) FROM manifest '
            'WHERE run = ? AND chain = ? AND "offset" IS NOT NULL GROUP BY source)', (run, chain))}
        chunks = {c for (c,) in self.conn.execute(
            "SELECT chunk FROM manifest WHERE run = ? AND chain = ? AND chunk IS NOT NULL",
            (run, chain))}
        return {"draws": int(row[0]) if row and row[0] is not None else 0, "offsets": offsets,
                "chunks": chunks, "warmup": int(row[1]) if row and row[1] is not None else 0,
                "position": newest[0] if newest else None, "last_draw": newest[1] if newest else None}

    def sources(self, run: str, chain: str | None = None) -> list[dict]:
        """The recorded identity of each committed input file of a run (``sources`` table), by
        chain and file; an empty list for a history written before the table existed."""
        try:
            if chain is None:
                return self._rows("SELECT * FROM sources WHERE run = ? ORDER BY chain, file", (run,))
            return self._rows("SELECT * FROM sources WHERE run = ? AND chain = ? ORDER BY file",
                              (run, chain))
        except sqlite3.OperationalError as err:
            if "no such table" in str(err):
                return []
            raise

    def manifest(self, run: str | None = None, chain: str | None = None) -> list[dict]:
        """Commit log rows, oldest first."""
        sql, args = "SELECT * FROM manifest WHERE 1", []
        if run is not None:
            sql, args = sql + " AND run = ?", args + [run]
        if chain is not None:
            sql, args = sql + " AND chain = ?", args + [chain]
        return self._rows(sql + " ORDER BY id", args)

    def _since(self, table: str, after_id: int, run: str | None, limit: int | None) -> list[dict]:
        """Rows of ``table`` with id > ``after_id`` (of one run, or all), oldest first."""
        sql, args = f"SELECT * FROM {table} WHERE id > ?", [int(after_id)]
        if run is not None:
            sql, args = sql + " AND run = ?", args + [run]
        sql += " ORDER BY id"
        if limit is not None:
            sql, args = sql + " LIMIT ?", args + [int(limit)]
        return self._rows(sql, args)

    def snapshots(self, run: str | None = None, after_id: int = 0,
                  limit: int | None = None) -> list[dict]:
        """Snapshots with id > ``after_id`` (of one run, or all), oldest first."""
        return self._since("snapshots", after_id, run, limit)

    def trail_points(self, run: str, since_draws_per_chain: float = 0) -> list[dict]:
        """The few columns the verdict's trail needs, per snapshot of ``run`` with at least
        ``since_draws_per_chain`` draws per chain, oldest first: ``draws_per_chain, loo_elpd,
        loo_mcse, time, rhat_max, ess_bulk_min, ess_tail_min`` and ``passed`` (from the verdict JSON;
        None when absent).  Cheaper than :meth:`snapshots` (no verdict text is parsed)."""
        rows = self._rows(
            "SELECT draws_per_chain, loo_elpd, loo_mcse, time, rhat_max, ess_bulk_min, ess_tail_min, "
            "json_extract(verdict, '$.passed') AS passed FROM snapshots WHERE run = ? AND "
            "draws_per_chain >= ? ORDER BY seq", (run, since_draws_per_chain))
        for row in rows:
            row["passed"] = None if row["passed"] is None else bool(row["passed"])
        return rows

    def service(self) -> dict | None:
        """The service liveness row: ``pid, started, heartbeat, stopped_at, crashed_at`` (None if no
        service ever wrote one).  ``heartbeat`` is renewed every pass of the loop."""
        try:
            return self._one("SELECT pid, started, heartbeat, stopped_at, crashed_at FROM service WHERE id = 1")
        except sqlite3.OperationalError:  # a file of an older layout opened read-only
            return None

    def latest_snapshot(self, run: str) -> dict | None:
        return self._one("SELECT * FROM snapshots WHERE run = ? ORDER BY seq DESC LIMIT 1", (run,))

    def snapshot(self, id: int) -> dict | None:
        return self._one("SELECT * FROM snapshots WHERE id = ?", (int(id),))

    def mixing(self, snapshot_id: int) -> list[dict]:
        """Per-parameter rows of a snapshot, in the order written."""
        return self._rows("SELECT * FROM mixing WHERE snapshot_id = ? ORDER BY rowid",
                          (int(snapshot_id),))

    def pointwise(self, run: str, snapshot_id: int | None = None) -> list[dict]:
        """Per-observation values of a run, by obs.

        Without ``snapshot_id``: the latest values (keys ``obs, label, elpd_loo, elpd_waic, k_hat,
        snapshot_id``).  With it: the nearest stored values at or before that snapshot; the
        ``snapshot_id`` key of each row names the snapshot they come from (``elpd_waic`` is None
        for thinned history rows, which keep only elpd_loo and k_hat).  Empty list if none.
        """
        latest = self._rows("SELECT obs, label, elpd_loo, elpd_waic, k_hat, snapshot_id, loo_source FROM "
                            "pointwise_latest WHERE run = ? ORDER BY obs", (run,))
        if snapshot_id is None:
            return latest
        snapshot_id = int(snapshot_id)
        if latest and latest[0]["snapshot_id"] <= snapshot_id:
            return latest
        found = self.conn.execute("SELECT MAX(snapshot_id) FROM pointwise_history WHERE run = ? "
                                  "AND snapshot_id <= ?", (run, snapshot_id)).fetchone()[0]
        if found is None:
            return []
        return self._rows(
            "SELECT h.obs AS obs, l.label AS label, h.elpd_loo AS elpd_loo, NULL AS elpd_waic, "
            "h.k_hat AS k_hat, h.snapshot_id AS snapshot_id, NULL AS loo_source FROM pointwise_history h "
            "LEFT JOIN pointwise_latest l ON l.run = h.run AND l.obs = h.obs "
            "WHERE h.run = ? AND h.snapshot_id = ? ORDER BY h.obs", (run, found))

    def comparisons(self, dataset: str | None = None, at_time: float | None = None) -> list[dict]:
        """Rows of the latest comparison round at or before ``at_time`` (default: now), per dataset.

        Ordered by dataset, then rank.
        """
        where, args = [], []
        if at_time is not None:
            where.append("time <= ?")
            args.append(float(at_time))
        if dataset is not None:
            where.append("dataset = ?")
            args.append(dataset)
        cond = ("WHERE " + " AND ".join(where)) if where else ""
        return self._rows(
            f"SELECT c.* FROM comparisons c JOIN (SELECT dataset, MAX(round) AS r FROM comparisons "
            f"{cond} GROUP BY dataset) m ON c.dataset IS m.dataset AND c.round = m.r "
            f"ORDER BY c.dataset, c.rank", args)

    def comparison_pairs(self, round: int) -> list[dict]:
        """Every stored pair of comparison round ``round`` (``run_a`` the better or equal run, ``delta``
        = elpd(run_a) - elpd(run_b) >= 0), in the order written; empty for rounds stored without
        pairs (before version 3)."""
        return self._rows("SELECT * FROM comparison_pairs WHERE round = ? ORDER BY rowid", (int(round),))

    def events(self, after_id: int = 0, run: str | None = None,
               limit: int | None = None) -> list[dict]:
        """Events with id > ``after_id`` (of one run, or all), oldest first."""
        return self._since("events", after_id, run, limit)

    def change_marker(self) -> tuple:
        """A cheap value that changes whenever anything is written to the file.

        ``PRAGMA data_version`` changes when another connection commits; ``total_changes`` covers
        this connection's own writes; the max ids make the value comparable across reopenings.
        """
        dv = self.conn.execute("PRAGMA data_version").fetchone()[0]
        ids = self.conn.execute(
            "SELECT (SELECT MAX(id) FROM snapshots), (SELECT MAX(id) FROM events), "
            "(SELECT MAX(id) FROM manifest), (SELECT MAX(id) FROM comparisons), "
            "(SELECT MAX(updated) FROM runs), (SELECT COUNT(*) FROM chains)").fetchone()
        return (dv, self.conn.total_changes, *ids)


class HistoryWriter(HistoryReader):
    """The service's read/write access: creates (or migrates) the file and owns every write.

    One writer per file (the service holds a lock on its state folder).  Every write method is one
    ``BEGIN IMMEDIATE`` transaction of plain SQL: the exactly-once protocol needs each commit-log
    entry to be exactly one transaction, so no library that manages transactions of its own is used
    for writes (sqlite-utils' ``upsert`` committed inside our transaction in the versions we tried).
    """

    readonly = False

    def __init__(self, path):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.conn = sqlite3.connect(str(self.path), timeout=BUSY_TIMEOUT_MS / 1000,
                                    check_same_thread=False, isolation_level=None)
        self.conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        try:
            self.conn.execute("PRAGMA journal_mode = WAL")
            # WAL + NORMAL survives a killed process; after a power cut the last commits may be
            # lost, which the exactly-once protocol tolerates (the draw store is cut back to them).
            self.conn.execute("PRAGMA synchronous = NORMAL")
            self._create_or_migrate()
        except BaseException:
            self.conn.close()
            raise

    @contextmanager
    def _tx(self):
        """One write transaction (BEGIN IMMEDIATE: takes the write lock up front)."""
        if self.readonly:
            raise PermissionError(f"history {self.path} is open read-only")
        self.conn.execute("BEGIN IMMEDIATE")
        try:
            yield self.conn
        except BaseException:
            self.conn.execute("ROLLBACK")
            raise
        self.conn.execute("COMMIT")

    def _create_or_migrate(self) -> None:
        with self._tx():
            version = self._schema_version()
            if version is None:
                for stmt in _DDL.split(";"):
                    if stmt.strip():
                        self.conn.execute(stmt)
                self.conn.executemany("INSERT INTO meta (key, value) VALUES (?, ?)",
                                      [("schema_version", str(SCHEMA_VERSION)),
                                       ("created", repr(_time.time()))])
                self.conn.execute(_SOURCES_DDL)
                return
            if version > SCHEMA_VERSION:
                raise ValueError(f"{self.path}: history schema version {version} is newer than "
                                 f"this chainvigil understands ({SCHEMA_VERSION})")
            while version < SCHEMA_VERSION:
                MIGRATIONS[version](self.conn)
                version += 1
                self.conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'",
                                  (str(version),))
            for stmt in _DDL.split(";"):  # tables a step could not extend because they were missing
                if stmt.strip():
                    self.conn.execute(stmt)
            self.conn.execute(_SOURCES_DDL)

    # ------------------------------------------------------------------ writes

    def upsert_run(self, name: str, **fields) -> None:
        """Create or update a run row; only the given fields change.

        On creation ``state`` defaults to 'gathering' and ``first_seen`` to now; ``updated`` is set
        to now on every call unless given.  ``labels`` (list) and ``targets`` (dict) are stored as JSON.
        """
        unknown = set(fields) - set(RUN_FIELDS)
        if unknown:
            raise ValueError(f"run {name!r}: unknown run field(s) {sorted(unknown)}; "
                             f"known: {', '.join(RUN_FIELDS)}")
        if "state" in fields and fields["state"] not in RUN_STATES:
            raise ValueError(f"run {name!r}: state {fields['state']!r} is not one of {RUN_STATES}")
        now = _time.time()
        record = {k: (_to_json(v) if k in _JSON_COLUMNS else _scalar(v)) for k, v in fields.items()}
        record.setdefault("updated", now)
        with self._tx():
            exists = self.conn.execute("SELECT 1 FROM runs WHERE name = ?", (name,)).fetchone()
            if not exists:
                record.setdefault("state", "gathering")
                record.setdefault("first_seen", now)
                cols = ["name", *record]
                self.conn.execute(f"INSERT INTO runs ({', '.join(cols)}) VALUES "
                                  f"({', '.join('?' * len(cols))})", (name, *record.values()))
            elif record:
                self.conn.execute(f"UPDATE runs SET {', '.join(f'{k} = ?' for k in record)} "
                                  f"WHERE name = ?", (*record.values(), name))

    def upsert_chain(self, run: str, chain: str, **fields) -> None:
        """Create or update a chain row; only the given fields change (``draws`` starts at 0)."""
        unknown = set(fields) - set(CHAIN_FIELDS)
        if unknown:
            raise ValueError(f"run {run!r}, chain {chain!r}: unknown chain field(s) "
                             f"{sorted(unknown)}; known: {', '.join(CHAIN_FIELDS)}")
        if "kind" in fields and fields["kind"] not in ("csv", "npz"):
            raise ValueError(f"run {run!r}, chain {chain!r}: kind {fields['kind']!r} is not "
                             f"'csv' or 'npz'")
        record = {k: (_to_json(v) if k in _JSON_COLUMNS else _scalar(v)) for k, v in fields.items()}
        with self._tx():
            exists = self.conn.execute("SELECT 1 FROM chains WHERE run = ? AND chain = ?",
                                       (run, chain)).fetchone()
            if not exists:
                record.setdefault("draws", 0)
                cols = ["run", "chain", *record]
                self.conn.execute(f"INSERT INTO chains ({', '.join(cols)}) VALUES "
                                  f"({', '.join('?' * len(cols))})", (run, chain, *record.values()))
            elif record:
                self.conn.execute(f"UPDATE chains SET {', '.join(f'{k} = ?' for k in record)} "
                                  f"WHERE run = ? AND chain = ?", (*record.values(), run, chain))

    def commit_ingest(self, run: str, chain: str, source: str, draws_added: int, draws_after: int,
                      offset: int | None = None, chunk: str | None = None, *, kind: str | None = None,
                      identity: dict | None = None, position: int | None = None,
                      last_draw: int | None = None, warmup: int | None = None) -> int:
        """Record an ingested piece (after its draws are durable in the draw store).

        One transaction: a manifest row (with the reader's ``position`` and ``last_draw`` after the
        piece), ``chains.draws = draws_after`` (and ``chains.warmup = warmup`` when given: the
        warm-up draws among the chain's committed draws), the chain's ``kind`` when it has none yet
        (a chain whose first piece had no draws is still recorded with its kind), and, with
        ``identity`` (fields of ``SOURCE_FIELDS``), the ``sources`` row of the file ``source``.
        Returns the manifest id.
        """
        if kind is not None and kind not in ("csv", "npz"):
            raise ValueError(f"run {run!r}, chain {chain!r}: kind {kind!r} is not 'csv' or 'npz'")
        if identity is not None and set(identity) - set(SOURCE_FIELDS):
            raise ValueError(f"run {run!r}, chain {chain!r}: unknown source field(s) "
                             f"{sorted(set(identity) - set(SOURCE_FIELDS))}")
        draws_added, draws_after = int(draws_added), int(draws_after)
        if draws_added < 0 or draws_after < draws_added:
            raise ValueError(f"run {run!r}, chain {chain!r}, source {source!r}: inconsistent "
                             f"counts draws_added={draws_added}, draws_after={draws_after}")
        if warmup is not None and not 0 <= int(warmup) <= draws_after:
            raise ValueError(f"run {run!r}, chain {chain!r}, source {source!r}: warm-up count "
                             f"{warmup} outside 0..{draws_after}")
        with self._tx() as conn:
            cur = conn.execute(
                'INSERT INTO manifest (run, chain, source, "offset", chunk, draws_added, '
                "draws_after, time, position, last_draw) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (run, chain, source, None if offset is None else int(offset), chunk, draws_added,
                 draws_after, _time.time(), None if position is None else int(position),
                 None if last_draw is None else int(last_draw)))
            conn.execute("INSERT INTO chains (run, chain, draws, kind) VALUES (?, ?, ?, ?) "
                         "ON CONFLICT (run, chain) DO UPDATE SET draws = excluded.draws, "
                         "kind = COALESCE(chains.kind, excluded.kind)",
                         (run, chain, draws_after, kind))
            if warmup is not None:
                conn.execute("UPDATE chains SET warmup = ? WHERE run = ? AND chain = ?",
                             (int(warmup), run, chain))
            if identity is not None:
                cols = list(identity)
                conn.execute(f"INSERT OR REPLACE INTO sources (run, chain, file, {', '.join(cols)}) "
                             f"VALUES ({', '.join('?' * (3 + len(cols)))})",
                             (run, chain, source, *(_scalar(identity[c]) for c in cols)))
            return int(cur.lastrowid)

    def reset_chain(self, run: str, chain: str) -> None:
        """Forget what the commit log says was read of a chain (its manifest and sources rows; its
        draws back to 0), in one transaction: the chain is read again from its files."""
        with self._tx() as conn:
            conn.execute("DELETE FROM manifest WHERE run = ? AND chain = ?", (run, chain))
            conn.execute("DELETE FROM sources WHERE run = ? AND chain = ?", (run, chain))
            conn.execute("UPDATE chains SET draws = 0, warmup = 0, param_names = NULL, header = NULL "
                         "WHERE run = ? AND chain = ?", (run, chain))

    def add_snapshot(self, run: str, row: dict, mixing=(), pointwise: dict | None = None,
                     keep_pointwise: bool = False) -> int:
        """Store one score update of ``run``; returns the snapshot id.

        ``row`` holds snapshot columns (``SNAPSHOT_FIELDS``; ``time`` defaults to now, ``verdict``
        a dict stored as JSON).  ``mixing`` is a list of dicts with ``param`` and any of ``mean,
        mcse, rhat, ess_bulk, ess_tail, sd, q05, q95, chain_means, chain_sds`` (lists, stored as
        JSON), ``more_draws`` (or a dict param -> figures); missing ones are stored as null.  ``pointwise`` is a dict of (n,) arrays
        ``elpd_loo``, ``elpd_waic``, ``k_hat`` and optionally ``labels`` (defaults to the run's
        labels) and ``obs`` (the 0-based observations the values belong to; default 0..n-1: a
        subsampled run stores its sampled observations only).  Assigns ``seq``, updates ``runs.updated``, replaces ``pointwise_latest`` and, for
        seq <= 5, seq % 5 == 0 or ``keep_pointwise``, appends to ``pointwise_history``; all in one
        transaction.
        """
        unknown = set(row) - set(SNAPSHOT_FIELDS)
        if unknown:
            raise ValueError(f"run {run!r}: unknown snapshot field(s) {sorted(unknown)}; "
                             f"known: {', '.join(SNAPSHOT_FIELDS)}")
        rec = {k: (_to_json(v) if k in _JSON_COLUMNS else _scalar(v)) for k, v in row.items()}
        rec.setdefault("time", _time.time())
        if isinstance(mixing, dict):
            mixing = [{"param": name, **vals} for name, vals in mixing.items()]
        mix_rows = []
        for m in mixing or ():
            bad = set(m) - set(MIXING_FIELDS)
            if bad or "param" not in m:
                raise ValueError(f"run {run!r}: mixing row {m!r} must have 'param' and only "
                                 f"{', '.join(MIXING_FIELDS)}")
            mix_rows.append(tuple(_to_json(m.get(k)) if k in _JSON_COLUMNS else _scalar(m.get(k))
                                  for k in MIXING_FIELDS))
        pw = None
        if pointwise:
            try:
                loo = np.asarray(pointwise["elpd_loo"], dtype=float)
                waic = np.asarray(pointwise["elpd_waic"], dtype=float)
                khat = np.asarray(pointwise["k_hat"], dtype=float)
            except KeyError as exc:
                raise ValueError(f"run {run!r}: pointwise values lack {exc.args[0]!r} (need "
                                 f"elpd_loo, elpd_waic, k_hat)") from None
            if not (loo.ndim == 1 and loo.shape == waic.shape == khat.shape):
                raise ValueError(f"run {run!r}: pointwise arrays must be (n,) of one length, got "
                                 f"elpd_loo {loo.shape}, elpd_waic {waic.shape}, k_hat {khat.shape}")
            source = pointwise.get("loo_source")
            if source is not None and len(source) != loo.shape[0]:
                raise ValueError(f"run {run!r}: loo_source has {len(source)} entries for {loo.shape[0]} "
                                 "observations")
            obs = pointwise.get("obs")
            obs = None if obs is None else [int(i) for i in np.asarray(obs, dtype=np.int64)]
            if obs is not None and len(obs) != loo.shape[0]:
                raise ValueError(f"run {run!r}: obs has {len(obs)} entries for {loo.shape[0]} values")
            pw = (loo, waic, khat, pointwise.get("labels"), source, obs)
        with self._tx() as conn:
            seq = conn.execute("SELECT COALESCE(MAX(seq), 0) + 1 FROM snapshots WHERE run = ?",
                               (run,)).fetchone()[0]
            cols = ["run", "seq", *rec]
            cur = conn.execute(f"INSERT INTO snapshots ({', '.join(cols)}) VALUES "
                               f"({', '.join('?' * len(cols))})", (run, seq, *rec.values()))
            sid = int(cur.lastrowid)
            if conn.execute("UPDATE runs SET updated = ? WHERE name = ?",
                            (rec["time"], run)).rowcount == 0:
                conn.execute("INSERT INTO runs (name, state, first_seen, updated) "
                             "VALUES (?, 'gathering', ?, ?)", (run, rec["time"], rec["time"]))
            if mix_rows:
                conn.executemany(
                    f"INSERT INTO mixing (snapshot_id, run, {', '.join(MIXING_FIELDS)}) "
                    f"VALUES ({', '.join('?' * (2 + len(MIXING_FIELDS)))})",
                    [(sid, run, *m) for m in mix_rows])
            if pw is not None:
                loo, waic, khat, labels, source, obs = pw
                n = loo.shape[0]
                if labels is None:
                    stored = conn.execute("SELECT labels FROM runs WHERE name = ?", (run,)).fetchone()
                    labels = json.loads(stored[0]) if stored and stored[0] else None
                    if labels is not None and obs is not None and len(labels) > max(obs, default=-1):
                        labels = [labels[i] for i in obs]
                if labels is None or len(labels) != n:
                    labels = [None] * n
                obs = range(n) if obs is None else obs
                lo, wa, kh = loo.tolist(), waic.tolist(), khat.tolist()
                conn.execute("DELETE FROM pointwise_latest WHERE run = ?", (run,))
                conn.executemany(
                    "INSERT INTO pointwise_latest (run, obs, label, elpd_loo, elpd_waic, k_hat, "
                    "snapshot_id, loo_source) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                    zip([run] * n, obs, labels, lo, wa, kh, [sid] * n,
                        list(source) if source is not None else [None] * n))
                self._thin_pointwise(conn, run, sid, rec.get("draws_per_chain"))
                conn.executemany(
                    "INSERT INTO pointwise_history (snapshot_id, run, obs, elpd_loo, k_hat, pinned) "
                    "VALUES (?, ?, ?, ?, ?, ?)",
                    zip([sid] * n, [run] * n, obs, lo, kh, [1 if keep_pointwise else None] * n))
            if seq % SNAPSHOT_THIN_BATCH == 0 and seq > SNAPSHOT_RECENT:
                self._thin_snapshots(conn, run, seq - SNAPSHOT_RECENT)
            return sid

    @staticmethod
    def _snapshot_signature(row) -> tuple:
        """What a thinned history must not lose a change of: the verdict (enough, passed, which checks
        fail, refit advice, activity), the k-hat level and how the headline was made."""
        try:
            verdict = json.loads(row["verdict"]) if row["verdict"] else {}
        except (TypeError, ValueError):
            verdict = {}
        if not isinstance(verdict, dict):
            verdict = {}
        failing = tuple(sorted(str(c.get("name")) for c in verdict.get("checks") or ()
                               if isinstance(c, dict) and c.get("ok") is False))
        k = row["k_max"]
        return (row["enough"], verdict.get("passed"), failing, bool(verdict.get("refit")),
                verdict.get("attention"), verdict.get("activity"),
                None if k is None else k > 0.7, row["loo_method"])

    def _thin_snapshots(self, conn, run: str, upto_seq: int) -> int:
        """Thin the rows of ``run`` with seq in (last thinned, ``upto_seq``] (see ``SNAPSHOT_RECENT``);
        returns the rows deleted.  Rows already thinned are not looked at again: a deleted row had the
        signature of the row before it, so the last row left before the batch stands for it."""
        key = f"snapshots_thinned:{run}"
        done = conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        done = int(done[0]) if done else 0
        if upto_seq <= done:
            return 0
        cur = conn.execute(
            "SELECT id, seq, draws_per_chain, enough, verdict, k_max, loo_method FROM snapshots "
            "WHERE run = ? AND seq <= ? AND seq >= COALESCE((SELECT MAX(seq) FROM snapshots WHERE "
            "run = ? AND seq <= ?), 0) ORDER BY seq", (run, upto_seq, run, done))
        keys = [d[0] for d in cur.description]
        rows = [dict(zip(keys, r)) for r in cur.fetchall()]
        if rows and rows[0]["seq"] <= done:
            previous, rows = rows[0], rows[1:]
            last_signature, last_draws = self._snapshot_signature(previous), previous["draws_per_chain"]
        else:
            last_signature, last_draws = None, None
        ids = [r["id"] for r in rows]
        pinned = set()
        if ids:
            marks = ",".join("?" * len(ids))
            for table in ("pointwise_history", "pointwise_latest"):
                pinned.update(v for (v,) in conn.execute(
                    f"SELECT DISTINCT snapshot_id FROM {table} WHERE run = ? AND snapshot_id IN ({marks})",
                    (run, *ids)))
        gone = []
        for row in rows:
            signature = self._snapshot_signature(row)
            draws = row["draws_per_chain"]
            keep = (last_signature is None or signature != last_signature or row["id"] in pinned
                    or draws is None or last_draws is None or draws >= SNAPSHOT_SPACING * last_draws)
            last_signature = signature
            if keep:
                last_draws = draws if draws is not None else last_draws
            else:
                gone.append(row["id"])
        if gone:
            marks = ",".join("?" * len(gone))
            conn.execute(f"DELETE FROM mixing WHERE snapshot_id IN ({marks})", gone)
            conn.execute(f"DELETE FROM snapshots WHERE id IN ({marks})", gone)
        conn.execute("INSERT OR REPLACE INTO meta (key, value) VALUES (?, ?)", (key, str(upto_seq)))
        return len(gone)

    def service_beat(self, *, started: bool = False, stopped: bool = False, crashed: bool = False,
                     now: float | None = None) -> None:
        """Renew the service liveness row: ``started`` opens a new life (clears stopped/crashed),
        every call sets ``heartbeat``, ``stopped``/``crashed`` record a clean stop or a crash."""
        t = _time.time() if now is None else float(now)
        import os as _os
        with self._tx() as conn:
            if started or conn.execute("SELECT 1 FROM service WHERE id = 1").fetchone() is None:
                conn.execute("INSERT OR REPLACE INTO service (id, pid, started, heartbeat, stopped_at, "
                             "crashed_at) VALUES (1, ?, ?, ?, NULL, NULL)", (_os.getpid(), t, t))
            conn.execute("UPDATE service SET heartbeat = ? WHERE id = 1", (t,))
            if stopped:
                conn.execute("UPDATE service SET stopped_at = ? WHERE id = 1", (t,))
            if crashed:
                conn.execute("UPDATE service SET crashed_at = ? WHERE id = 1", (t,))

    @staticmethod
    def _thin_pointwise(conn, run: str, new_id: int, new_draws) -> None:
        """Geometric thinning of ``pointwise_history`` before the values of snapshot ``new_id`` are added.

        Kept: the first snapshot's values, pinned ones (``keep_pointwise``), the latest, and a chain of
        snapshots each at least ``POINTWISE_SPACING`` times the draws per chain of the previous kept
        one.  The previous latest stays only if it is that far above the kept one before it, so at most
        one snapshot's rows go per call and the table holds O(log draws) snapshots, not O(snapshots).
        """
        def kept_below(bound):
            sid = conn.execute("SELECT MAX(snapshot_id) FROM pointwise_history WHERE run = ? AND "
                               "snapshot_id < ?", (run, bound)).fetchone()[0]
            if sid is None:
                return None
            row = conn.execute("SELECT s.draws_per_chain, h.pinned FROM pointwise_history h JOIN "
                               "snapshots s ON s.id = h.snapshot_id WHERE h.run = ? AND "
                               "h.snapshot_id = ? LIMIT 1", (run, sid)).fetchone()
            return sid, row[0], row[1]

        last = kept_below(new_id)
        before = kept_below(last[0]) if last else None
        if before is None:
            return  # nothing, or only the first: keep it
        (last_id, last_draws, last_pinned), (_, before_draws, _) = last, before
        first = conn.execute("SELECT MIN(snapshot_id) FROM pointwise_history WHERE run = ?",
                             (run,)).fetchone()[0]
        if last_id == first or last_pinned:
            return
        if last_draws is not None and before_draws is not None and \
                last_draws >= POINTWISE_SPACING * before_draws:
            return  # spaced far enough: stays
        conn.execute("DELETE FROM pointwise_history WHERE run = ? AND snapshot_id = ?", (run, last_id))

    def add_comparison(self, dataset: str, rows: list[dict], time: float | None = None,
                       pairs=()) -> int:
        """Store one comparison pass over the runs of ``dataset``; returns its round number.

        Each row has ``run, rank, elpd, delta, se_delta, mcse_delta, weight, caution, may_flip``
        (``rank`` defaults to the row's position, 1 = best).  ``pairs`` (optional) holds one dict
        per unordered pair with ``run_a, run_b, delta, se_delta, mcse_delta, caution, may_flip``
        (``chainvigil.estimators.compare.pairwise_differences``), stored in ``comparison_pairs``
        under the same round, in the same transaction.
        """
        t = _time.time() if time is None else float(time)
        records = []
        for i, r in enumerate(rows, start=1):
            bad = set(r) - set(COMPARISON_FIELDS)
            if bad or "run" not in r:
                raise ValueError(f"dataset {dataset!r}: comparison row {r!r} must have 'run' and "
                                 f"only {', '.join(COMPARISON_FIELDS)}")
            rec = {k: _scalar(r.get(k)) for k in COMPARISON_FIELDS}
            if rec["rank"] is None:
                rec["rank"] = i
            records.append(rec)
        pair_records = []
        for p in pairs or ():
            bad = set(p) - set(PAIR_FIELDS)
            if bad or "run_a" not in p or "run_b" not in p:
                raise ValueError(f"dataset {dataset!r}: comparison pair {p!r} must have 'run_a', "
                                 f"'run_b' and only {', '.join(PAIR_FIELDS)}")
            pair_records.append(tuple(_scalar(p.get(k)) for k in PAIR_FIELDS))
        with self._tx() as conn:
            rnd = conn.execute("SELECT COALESCE(MAX(round), 0) + 1 FROM comparisons").fetchone()[0]
            conn.executemany(
                f"INSERT INTO comparisons (round, time, dataset, {', '.join(COMPARISON_FIELDS)}) "
                f"VALUES ({', '.join('?' * (3 + len(COMPARISON_FIELDS)))})",
                [(rnd, t, dataset, *rec.values()) for rec in records])
            if pair_records:
                conn.executemany(
                    f"INSERT INTO comparison_pairs (round, time, dataset, {', '.join(PAIR_FIELDS)}) "
                    f"VALUES ({', '.join('?' * (3 + len(PAIR_FIELDS)))})",
                    [(rnd, t, dataset, *rec) for rec in pair_records])
            return int(rnd)

    def add_event(self, level: str, kind: str, message: str, run: str | None = None,
                  file: str | None = None) -> int:
        """Log an event; returns its id."""
        if level not in EVENT_LEVELS:
            raise ValueError(f"event level {level!r} is not one of {EVENT_LEVELS}")
        with self._tx() as conn:
            cur = conn.execute("INSERT INTO events (time, run, file, level, kind, message) "
                               "VALUES (?, ?, ?, ?, ?, ?)",
                               (_time.time(), run, None if file is None else str(file), level,
                                kind, message))
            return int(cur.lastrowid)

    def set_run_state(self, run: str, state: str, enough_at: float | None = None,
                      reason: str | None = None) -> None:
        """Set a run's state (and ``enough_at`` when given); ``reason`` is kept in ``state_reason``
        (cleared when None)."""
        if state not in RUN_STATES:
            raise ValueError(f"run {run!r}: state {state!r} is not one of {RUN_STATES}")
        fields = {"state": state, "state_reason": reason}
        if enough_at is not None:
            fields["enough_at"] = float(enough_at)
        self.upsert_run(run, **fields)


def History(path, readonly: bool = False) -> HistoryReader:
    """``HistoryReader(path)`` when ``readonly``, else ``HistoryWriter(path)``."""
    return HistoryReader(path) if readonly else HistoryWriter(path)
