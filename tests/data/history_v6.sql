-- A version-6 chainvigil history as the version-6 HistoryWriter wrote it: one run in each of the six
-- run states of that version (collecting, settled, attention, set_aside, paused, finished), with a
-- snapshot each (whose verdict names the check "settled"), events and the service row.  Dumped
-- with sqlite3 iterdump; tests/test_history.py builds the file from it to check the version-7 step.
BEGIN TRANSACTION;
CREATE TABLE chains (
    run TEXT NOT NULL, chain TEXT NOT NULL, kind TEXT, param_names TEXT, header TEXT,
    draws INTEGER NOT NULL DEFAULT 0, warmup INTEGER NOT NULL DEFAULT 0, PRIMARY KEY (run, chain));
INSERT INTO "chains" VALUES('run_collecting','c1','csv','["mu"]',NULL,40,0);
INSERT INTO "chains" VALUES('run_settled','c1','csv','["mu"]',NULL,40,0);
INSERT INTO "chains" VALUES('run_attention','c1','csv','["mu"]',NULL,40,0);
INSERT INTO "chains" VALUES('run_set_aside','c1','csv','["mu"]',NULL,40,0);
INSERT INTO "chains" VALUES('run_paused','c1','csv','["mu"]',NULL,40,0);
INSERT INTO "chains" VALUES('run_finished','c1','csv','["mu"]',NULL,40,0);
CREATE TABLE comparison_pairs (
    round INTEGER NOT NULL, time REAL, dataset TEXT, run_a TEXT, run_b TEXT, delta REAL,
    se_delta REAL, mcse_delta REAL, caution INTEGER, may_flip INTEGER);
CREATE TABLE comparisons (
    id INTEGER PRIMARY KEY, round INTEGER NOT NULL, time REAL, dataset TEXT, run TEXT, rank INTEGER,
    elpd REAL, delta REAL, se_delta REAL, mcse_delta REAL, weight REAL, caution INTEGER,
    may_flip INTEGER);
CREATE TABLE events (
    id INTEGER PRIMARY KEY, time REAL, run TEXT, file TEXT, level TEXT, kind TEXT, message TEXT);
INSERT INTO "events" VALUES(1,1.79629387751500487323e+09,'run_settled',NULL,'info','enough','run ''run_settled'' has enough draws');
INSERT INTO "events" VALUES(2,1.79629387751505732533e+09,'run_set_aside',NULL,'error','run_set_aside','run ''run_set_aside'' set aside: line 3');
CREATE TABLE manifest (
    id INTEGER PRIMARY KEY, run TEXT NOT NULL, chain TEXT NOT NULL, source TEXT, "offset" INTEGER,
    chunk TEXT, draws_added INTEGER, draws_after INTEGER, time REAL, position INTEGER,
    last_draw INTEGER);
INSERT INTO "manifest" VALUES(1,'run_collecting','c1','c1.csv',1200,NULL,40,40,1.79629387751210451125e+09,40,40);
INSERT INTO "manifest" VALUES(2,'run_settled','c1','c1.csv',1200,NULL,40,40,1.79629387751297330856e+09,40,40);
INSERT INTO "manifest" VALUES(3,'run_attention','c1','c1.csv',1200,NULL,40,40,1.79629387751344203952e+09,40,40);
INSERT INTO "manifest" VALUES(4,'run_set_aside','c1','c1.csv',1200,NULL,40,40,1.79629387751387524603e+09,40,40);
INSERT INTO "manifest" VALUES(5,'run_paused','c1','c1.csv',1200,NULL,40,40,1.79629387751433300976e+09,40,40);
INSERT INTO "manifest" VALUES(6,'run_finished','c1','c1.csv',1200,NULL,40,40,1.79629387751475095742e+09,40,40);
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT);
INSERT INTO "meta" VALUES('schema_version','6');
INSERT INTO "meta" VALUES('created','1796293877.5106342');
CREATE TABLE mixing (
    snapshot_id INTEGER NOT NULL, run TEXT, param TEXT, mean REAL, mcse REAL, rhat REAL,
    ess_bulk REAL, ess_tail REAL, sd REAL, q05 REAL, q95 REAL, chain_means TEXT, chain_sds TEXT,
    more_draws INTEGER);
INSERT INTO "mixing" VALUES(1,'run_collecting','mu',0.1,NULL,1.01,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "mixing" VALUES(2,'run_settled','mu',0.1,NULL,1.01,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "mixing" VALUES(3,'run_attention','mu',0.1,NULL,1.01,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "mixing" VALUES(4,'run_set_aside','mu',0.1,NULL,1.01,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "mixing" VALUES(5,'run_paused','mu',0.1,NULL,1.01,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "mixing" VALUES(6,'run_finished','mu',0.1,NULL,1.01,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL);
CREATE TABLE pointwise_history (
    snapshot_id INTEGER NOT NULL, run TEXT NOT NULL, obs INTEGER NOT NULL, elpd_loo REAL,
    k_hat REAL, pinned INTEGER);
INSERT INTO "pointwise_history" VALUES(1,'run_collecting',0,-1.0,0.1,NULL);
INSERT INTO "pointwise_history" VALUES(1,'run_collecting',1,-1.5,0.2,NULL);
INSERT INTO "pointwise_history" VALUES(1,'run_collecting',2,-1.7,0.3,NULL);
INSERT INTO "pointwise_history" VALUES(2,'run_settled',0,-1.0,0.1,NULL);
INSERT INTO "pointwise_history" VALUES(2,'run_settled',1,-1.5,0.2,NULL);
INSERT INTO "pointwise_history" VALUES(2,'run_settled',2,-2.7,0.3,NULL);
INSERT INTO "pointwise_history" VALUES(3,'run_attention',0,-1.0,0.1,NULL);
INSERT INTO "pointwise_history" VALUES(3,'run_attention',1,-1.5,0.2,NULL);
INSERT INTO "pointwise_history" VALUES(3,'run_attention',2,-3.7,0.3,NULL);
INSERT INTO "pointwise_history" VALUES(4,'run_set_aside',0,-1.0,0.1,NULL);
INSERT INTO "pointwise_history" VALUES(4,'run_set_aside',1,-1.5,0.2,NULL);
INSERT INTO "pointwise_history" VALUES(4,'run_set_aside',2,-4.7,0.3,NULL);
INSERT INTO "pointwise_history" VALUES(5,'run_paused',0,-1.0,0.1,NULL);
INSERT INTO "pointwise_history" VALUES(5,'run_paused',1,-1.5,0.2,NULL);
INSERT INTO "pointwise_history" VALUES(5,'run_paused',2,-5.7,0.3,NULL);
INSERT INTO "pointwise_history" VALUES(6,'run_finished',0,-1.0,0.1,NULL);
INSERT INTO "pointwise_history" VALUES(6,'run_finished',1,-1.5,0.2,NULL);
INSERT INTO "pointwise_history" VALUES(6,'run_finished',2,-6.7,0.3,NULL);
CREATE TABLE pointwise_latest (
    run TEXT NOT NULL, obs INTEGER NOT NULL, label TEXT, elpd_loo REAL, elpd_waic REAL, k_hat REAL,
    snapshot_id INTEGER, loo_source TEXT, PRIMARY KEY (run, obs));
INSERT INTO "pointwise_latest" VALUES('run_collecting',0,'a',-1.0,-1.0,0.1,1,NULL);
INSERT INTO "pointwise_latest" VALUES('run_collecting',1,'b',-1.5,-1.5,0.2,1,NULL);
INSERT INTO "pointwise_latest" VALUES('run_collecting',2,'c',-1.7,-1.7,0.3,1,NULL);
INSERT INTO "pointwise_latest" VALUES('run_settled',0,'a',-1.0,-1.0,0.1,2,NULL);
INSERT INTO "pointwise_latest" VALUES('run_settled',1,'b',-1.5,-1.5,0.2,2,NULL);
INSERT INTO "pointwise_latest" VALUES('run_settled',2,'c',-2.7,-2.7,0.3,2,NULL);
INSERT INTO "pointwise_latest" VALUES('run_attention',0,'a',-1.0,-1.0,0.1,3,NULL);
INSERT INTO "pointwise_latest" VALUES('run_attention',1,'b',-1.5,-1.5,0.2,3,NULL);
INSERT INTO "pointwise_latest" VALUES('run_attention',2,'c',-3.7,-3.7,0.3,3,NULL);
INSERT INTO "pointwise_latest" VALUES('run_set_aside',0,'a',-1.0,-1.0,0.1,4,NULL);
INSERT INTO "pointwise_latest" VALUES('run_set_aside',1,'b',-1.5,-1.5,0.2,4,NULL);
INSERT INTO "pointwise_latest" VALUES('run_set_aside',2,'c',-4.7,-4.7,0.3,4,NULL);
INSERT INTO "pointwise_latest" VALUES('run_paused',0,'a',-1.0,-1.0,0.1,5,NULL);
INSERT INTO "pointwise_latest" VALUES('run_paused',1,'b',-1.5,-1.5,0.2,5,NULL);
INSERT INTO "pointwise_latest" VALUES('run_paused',2,'c',-5.7,-5.7,0.3,5,NULL);
INSERT INTO "pointwise_latest" VALUES('run_finished',0,'a',-1.0,-1.0,0.1,6,NULL);
INSERT INTO "pointwise_latest" VALUES('run_finished',1,'b',-1.5,-1.5,0.2,6,NULL);
INSERT INTO "pointwise_latest" VALUES('run_finished',2,'c',-6.7,-6.7,0.3,6,NULL);
CREATE TABLE runs (
    name TEXT PRIMARY KEY, folder TEXT, title TEXT, dataset TEXT, n_obs INTEGER, n_params INTEGER,
    point_loglik REAL, labels TEXT, targets TEXT, state TEXT, first_seen REAL, updated REAL,
    enough_at REAL, state_reason TEXT, read_options TEXT, refit_of TEXT, fold INTEGER);
INSERT INTO "runs" VALUES('run_collecting','/runs/run_collecting','collecting run','lakes',3,1,NULL,'["a", "b", "c"]','{}','collecting',1790000000.0,1.79629387751275849342e+09,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "runs" VALUES('run_settled','/runs/run_settled','settled run','lakes',3,1,NULL,'["a", "b", "c"]','{}','settled',1790000000.0,1.79629387751325607304e+09,1790000011.0,NULL,NULL,NULL,NULL);
INSERT INTO "runs" VALUES('run_attention','/runs/run_attention','attention run','lakes',3,1,NULL,'["a", "b", "c"]','{}','attention',1790000000.0,1.79629387751367402071e+09,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "runs" VALUES('run_set_aside','/runs/run_set_aside','set_aside run','lakes',3,1,NULL,'["a", "b", "c"]','{}','set_aside',1790000000.0,1.79629387751418590542e+09,NULL,'reading failed on /runs/run_set_aside/c1.csv: line 3',NULL,NULL,NULL);
INSERT INTO "runs" VALUES('run_paused','/runs/run_paused','paused run','lakes',3,1,NULL,'["a", "b", "c"]','{}','paused',1790000000.0,1.79629387751456284522e+09,NULL,NULL,NULL,NULL,NULL);
INSERT INTO "runs" VALUES('run_finished','/runs/run_finished','finished run','lakes',3,1,NULL,'["a", "b", "c"]','{}','finished',1790000000.0,1.7962938775149648189e+09,NULL,NULL,NULL,NULL,NULL);
CREATE TABLE service (
    id INTEGER PRIMARY KEY CHECK (id = 1), pid INTEGER, started REAL, heartbeat REAL, stopped_at REAL,
    crashed_at REAL);
INSERT INTO "service" VALUES(1,27554,1.79629387751508903499e+09,1.79629387751508903499e+09,NULL,NULL);
CREATE TABLE snapshots (
    id INTEGER PRIMARY KEY, run TEXT NOT NULL, seq INTEGER NOT NULL, time REAL, chains INTEGER, draws INTEGER, draws_per_chain INTEGER, draw_rate REAL, r_eff_mean REAL, r_eff_source TEXT, joint_pass INTEGER, loo_elpd REAL, loo_se REAL, loo_mcse REAL, loo_p_eff REAL, waic_elpd REAL, waic_se REAL, waic_p_eff REAL, dic_elpd REAL, dic_p_eff REAL, aic_elpd REAL, aic_p_eff REAL, k_max REAL, k_threshold REAL, k_above INTEGER, rhat_max REAL, ess_bulk_min REAL, ess_tail_min REAL, enough INTEGER, verdict TEXT, loo_method TEXT, loo_exact INTEGER, loo_pending INTEGER, loo_psis INTEGER, loo_psis_elpd REAL);
INSERT INTO "snapshots" VALUES(1,'run_collecting',1,1790000010.0,1,40,40,NULL,NULL,NULL,NULL,-4.2,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,0.3,NULL,0,NULL,NULL,NULL,0,'{"enough": false, "checks": [{"name": "settled", "ok": false}]}',NULL,NULL,NULL,NULL,NULL);
INSERT INTO "snapshots" VALUES(2,'run_settled',1,1790000011.0,1,40,40,NULL,NULL,NULL,NULL,-5.2,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,0.3,NULL,0,NULL,NULL,NULL,1,'{"enough": true, "checks": [{"name": "settled", "ok": true}]}',NULL,NULL,NULL,NULL,NULL);
INSERT INTO "snapshots" VALUES(3,'run_attention',1,1790000012.0,1,40,40,NULL,NULL,NULL,NULL,-6.2,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,0.3,NULL,0,NULL,NULL,NULL,0,'{"enough": false, "checks": [{"name": "settled", "ok": false}]}',NULL,NULL,NULL,NULL,NULL);
INSERT INTO "snapshots" VALUES(4,'run_set_aside',1,1790000013.0,1,40,40,NULL,NULL,NULL,NULL,-7.2,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,0.3,NULL,0,NULL,NULL,NULL,0,'{"enough": false, "checks": [{"name": "settled", "ok": false}]}',NULL,NULL,NULL,NULL,NULL);
INSERT INTO "snapshots" VALUES(5,'run_paused',1,1790000014.0,1,40,40,NULL,NULL,NULL,NULL,-8.2,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,0.3,NULL,0,NULL,NULL,NULL,0,'{"enough": false, "checks": [{"name": "settled", "ok": false}]}',NULL,NULL,NULL,NULL,NULL);
INSERT INTO "snapshots" VALUES(6,'run_finished',1,1790000015.0,1,40,40,NULL,NULL,NULL,NULL,-9.2,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,NULL,0.3,NULL,0,NULL,NULL,NULL,0,'{"enough": false, "checks": [{"name": "settled", "ok": false}]}',NULL,NULL,NULL,NULL,NULL);
CREATE TABLE sources (
    run TEXT NOT NULL, chain TEXT NOT NULL, file TEXT NOT NULL, origin TEXT, dev INTEGER,
    ino INTEGER, size INTEGER, mtime_ns INTEGER, head TEXT, tail TEXT, digest TEXT,
    PRIMARY KEY (run, chain, file));
CREATE INDEX manifest_run_chain ON manifest (run, chain);
CREATE UNIQUE INDEX snapshots_run_seq ON snapshots (run, seq);
CREATE INDEX mixing_snapshot ON mixing (snapshot_id);
CREATE INDEX pointwise_history_run ON pointwise_history (run, snapshot_id, obs);
CREATE INDEX comparisons_dataset ON comparisons (dataset, round);
CREATE INDEX comparison_pairs_round ON comparison_pairs (round);
CREATE INDEX events_run ON events (run, id);
COMMIT;
