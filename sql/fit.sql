--
-- affinity.fit: input handling, statistics, options, determinism, methods.
--
SET extra_float_digits = 0;

CREATE TABLE fit_buys AS
SELECT u::bigint AS user_id,
       (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS item_id,
       (1 + (u * i) % 3)::real AS weight
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

SELECT count(*) AS rows, count(DISTINCT user_id) AS users,
       count(DISTINCT item_id) AS items FROM fit_buys;

-- counts, with NULL rows, zero weights and duplicates added to the input
CREATE TABLE fit_input AS
SELECT * FROM fit_buys
UNION ALL SELECT NULL, 1, 1
UNION ALL SELECT 1, NULL, 1
UNION ALL SELECT 1, 1, NULL
UNION ALL SELECT 2, 5, 0
UNION ALL SELECT user_id, item_id, 1 FROM fit_buys WHERE user_id <= 3;

CREATE TABLE fit_models AS
SELECT affinity.fit(user_id, item_id, weight,
                    '{"factors": 8, "iterations": 6, "threads": 1}') AS model
FROM fit_input;

SELECT d->>'method' AS method, d->'users' AS users, d->'items' AS items,
       d->'interactions' AS interactions, d->'rows_read' AS rows_read,
       d->'rows_skipped_null' AS nulls, d->'rows_skipped_zero' AS zeros,
       d->'duplicates_summed' AS duplicates, jsonb_array_length(d->'loss') AS sweeps
FROM (SELECT affinity.describe(model) AS d FROM fit_models) s;

-- options as used
SELECT affinity.describe(model)->'options' AS options FROM fit_models;

-- the loss falls every sweep (conjugate gradient lowers each row's objective)
SELECT bool_and((l.value)::float8 <= (p.value)::float8) AS loss_falls
FROM fit_models,
     jsonb_array_elements(affinity.describe(model)->'loss') WITH ORDINALITY l(value, n),
     jsonb_array_elements(affinity.describe(model)->'loss') WITH ORDINALITY p(value, n)
WHERE l.n = p.n + 1;

-- duplicates are summed: the fit of fit_input (users 1-3 have every pair
-- twice) has exactly the factors of a fit of the same rows summed per pair
-- beforehand, and not those of the rows with their largest weight kept
CREATE TABLE fit_summed AS SELECT
  (SELECT affinity.fit(user_id, item_id, w, '{"factors": 8, "iterations": 6, "threads": 1}')
     FROM (SELECT user_id, item_id, sum(weight) AS w FROM fit_input
            WHERE user_id IS NOT NULL AND item_id IS NOT NULL AND weight <> 0
            GROUP BY 1, 2) s) AS summed,
  (SELECT affinity.fit(user_id, item_id, w, '{"factors": 8, "iterations": 6, "threads": 1}')
     FROM (SELECT user_id, item_id, max(weight) AS w FROM fit_input
            WHERE user_id IS NOT NULL AND item_id IS NOT NULL AND weight <> 0
            GROUP BY 1, 2) s) AS kept_max;
SELECT (SELECT array_agg(t.vector ORDER BY t.user_id) FROM fit_models, affinity.user_vectors(model) t)
     = (SELECT array_agg(t.vector ORDER BY t.user_id) FROM fit_summed, affinity.user_vectors(summed) t)
       AS users_as_summed,
       (SELECT array_agg(t.vector ORDER BY t.item_id) FROM fit_models, affinity.item_vectors(model) t)
     = (SELECT array_agg(t.vector ORDER BY t.item_id) FROM fit_summed, affinity.item_vectors(summed) t)
       AS items_as_summed,
       (SELECT array_agg(t.vector ORDER BY t.user_id) FROM fit_models, affinity.user_vectors(model) t)
     = (SELECT array_agg(t.vector ORDER BY t.user_id) FROM fit_summed, affinity.user_vectors(kept_max) t)
       AS users_as_max_kept;

-- determinism: same rows, options and seed give the same model content
SELECT a = b AS same_fingerprint FROM
  (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
          '{"factors": 8, "iterations": 4, "threads": 1}'))->>'fingerprint' AS a FROM fit_buys) x,
  (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
          '{"factors": 8, "iterations": 4, "threads": 1}'))->>'fingerprint' AS b FROM fit_buys) y;
SELECT a <> b AS other_seed_differs FROM
  (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
          '{"factors": 8, "iterations": 4, "threads": 1}'))->>'fingerprint' AS a FROM fit_buys) x,
  (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
          '{"factors": 8, "iterations": 4, "threads": 1, "seed": 7}'))->>'fingerprint' AS b FROM fit_buys) y;

-- the exact solver
SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
         '{"factors": 4, "iterations": 3, "solver": "cholesky", "confidence": "linear", "alpha": 2, "threads": 1}'))->'options'
FROM fit_buys;

-- GUCs give the defaults of options left out
SET affinity.factors = 6;
SET affinity.iterations = 2;
SET affinity.alpha = 3.5;
SET affinity.regularization = 0.25;
SELECT o->'factors' AS factors, o->'iterations' AS iterations, o->'alpha' AS alpha,
       o->'regularization' AS regularization
FROM (SELECT affinity.describe(affinity.fit(user_id, item_id, weight))->'options' AS o FROM fit_buys) s;
RESET affinity.factors;
RESET affinity.iterations;
RESET affinity.alpha;
RESET affinity.regularization;

-- minimum interactions: users with fewer than 8 distinct items are dropped
SELECT d->'users' AS users, d->'dropped_users' AS dropped_users,
       d->'dropped_interactions' AS dropped_interactions
FROM (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
        '{"factors": 4, "iterations": 2, "min_user_interactions": 8}')) AS d FROM fit_buys) s;
SELECT count(*) AS users_with_8_or_more
FROM (SELECT user_id FROM fit_buys GROUP BY user_id HAVING count(*) >= 8) s;

-- one model per group
SELECT user_id <= 30 AS first_group,
       affinity.describe(affinity.fit(user_id, item_id, weight, '{"factors": 4, "iterations": 2}'))->'items' AS items
FROM fit_buys GROUP BY user_id <= 30 ORDER BY 1;

-- popularity: counts of distinct users per item
CREATE TABLE fit_pop AS
SELECT affinity.fit(user_id, item_id, weight, '{"method": "popularity"}') AS model FROM fit_buys;
SELECT d->>'method' AS method, d->'loss' AS loss, d->'options' AS options
FROM (SELECT affinity.describe(model) AS d FROM fit_pop) s;
SELECT t.item_id, t.score, t.rank,
       (SELECT count(DISTINCT user_id) FROM fit_buys b WHERE b.item_id = t.item_id) AS buyers
FROM fit_pop, affinity.top_items(model, 999, 5) t ORDER BY t.rank;

-- parallel input: a parallel scan feeds partial states that are combined,
-- and the model is the same as without workers
CREATE TABLE fit_many AS
SELECT (abs(hashint4(g)) % 3000)::bigint AS user_id, (abs(hashint4(g * 7 + 1)) % 300)::bigint AS item_id,
       (1 + g % 4)::real AS weight
FROM generate_series(1, 60000) g;
ANALYZE fit_many;
SET max_parallel_workers_per_gather = 0;
CREATE TABLE fit_serial AS
SELECT affinity.describe(affinity.fit(user_id, item_id, weight, '{"factors": 8, "iterations": 2, "threads": 1}')) AS d
FROM fit_many;
SET max_parallel_workers_per_gather = 2;
SET parallel_setup_cost = 0;
SET parallel_tuple_cost = 0;
SET min_parallel_table_scan_size = 0;
SET parallel_leader_participation = off;
EXPLAIN (COSTS OFF)
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 8, "iterations": 2, "threads": 1}') FROM fit_many;
SELECT s.d->>'fingerprint' = p.d->>'fingerprint' AS same_model,
       p.d->'rows_read' AS rows_read, p.d->'duplicates_summed' AS duplicates
FROM fit_serial s,
     (SELECT affinity.describe(affinity.fit(user_id, item_id, weight, '{"factors": 8, "iterations": 2, "threads": 1}')) AS d
      FROM fit_many) p;
RESET max_parallel_workers_per_gather;
RESET parallel_setup_cost;
RESET parallel_tuple_cost;
RESET min_parallel_table_scan_size;
RESET parallel_leader_participation;

-- fit is no window aggregate: its final function frees the rows it collected
-- and keeps its result (FINALFUNC_MODIFY = READ_WRITE), so a running fit,
-- which would need a model per row, is refused by PostgreSQL
SELECT u, affinity.describe(affinity.fit(u, i, 1::real, '{"method": "popularity"}') OVER (ORDER BY u))->'users' AS users
FROM (VALUES (1::bigint, 10::bigint), (2, 11), (3, 12)) v(u, i);
SELECT u, affinity.describe(affinity.fit(u::text, i::text, 1::real) OVER (ORDER BY u))->'users' AS users
FROM (VALUES (1::bigint, 10::bigint), (2, 11), (3, 12)) v(u, i);
-- what each aggregate declares (ranking_metrics sorts its state: shareable)
SELECT a.aggfnoid::regprocedure AS aggregate, a.aggfinalmodify
FROM pg_aggregate a JOIN pg_proc p ON p.oid = a.aggfnoid
WHERE p.pronamespace = 'affinity'::regnamespace
ORDER BY a.aggfnoid::regprocedure::text;
-- a grid keeps working: two fits of the same rows in one query get their own states
SELECT affinity.describe(affinity.fit(u, i, 1::real, '{"method": "popularity"}'))->'users' AS a,
       affinity.describe(affinity.fit(u, i, 1::real, '{"method": "popularity"}'))->'items' AS b
FROM (VALUES (1::bigint, 10::bigint), (2, 11), (3, 12)) v(u, i);
-- the thread count does not change the factors (each row is solved alone),
-- at a size where threads share the work: fit_many's 3000 users and 300
-- items are 47 and 5 blocks of 64 rows.  affinity.max_threads is raised so
-- that 2 threads run even on a one-CPU machine; describe() records the count
-- used (which blocks each thread took is not visible from SQL).
SET affinity.max_threads = 2;
CREATE TABLE fit_threads AS SELECT
  affinity.fit(user_id, item_id, weight, '{"factors": 8, "iterations": 3, "threads": 1}') AS one,
  affinity.fit(user_id, item_id, weight, '{"factors": 8, "iterations": 3, "threads": 2}') AS two
FROM fit_many;
RESET affinity.max_threads;
SELECT affinity.describe(one)->'options'->'threads' AS threads_a,
       affinity.describe(two)->'options'->'threads' AS threads_b,
       ((affinity.describe(two)->>'users')::int + 63) / 64 AS user_blocks,
       ((affinity.describe(two)->>'items')::int + 63) / 64 AS item_blocks
FROM fit_threads;
SELECT count(*) AS users, bool_and(a.vector = b.vector) AS user_vectors_agree
FROM fit_threads, affinity.user_vectors(one) a JOIN affinity.user_vectors(two) b USING (user_id);
SELECT count(*) AS items, bool_and(a.vector = b.vector) AS item_vectors_agree
FROM fit_threads, affinity.item_vectors(one) a JOIN affinity.item_vectors(two) b USING (item_id);
