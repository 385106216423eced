--
-- affinity.ranking_metrics: a worked example computed by hand from the
-- published definitions, and the same figures with a parallel plan.
--
-- Training: users 1-5 bought items 1..(6-u), user 6 items 6, 7, 8 and user
-- 7 items 6, 7.  Buyer counts: item 1: 5, 2: 4, 3: 3, 4: 2, 6: 2, 7: 2,
-- 5: 1, 8: 1, so a popularity model ranks 1, 2, 3, 4, 6, 7, 5, 8 (ties to
-- the smaller id).
CREATE TABLE met_train AS
SELECT u::bigint AS user_id, i::bigint AS item_id, 1::real AS weight
FROM generate_series(1, 5) u, generate_series(1, 5) i WHERE i <= 6 - u
UNION ALL VALUES (6, 6, 1), (6, 7, 1), (6, 8, 1), (7, 6, 1), (7, 7, 1);
CREATE TABLE met_model AS
SELECT affinity.fit(user_id, item_id, weight, '{"method": "popularity"}') AS model FROM met_train;
SELECT array_agg(item_id ORDER BY rank) AS overall FROM met_model, affinity.top_items(model, -1, 8);

-- Held out: user 5 gets items 3, 8 and 99 (99 is new to the catalogue:
-- relevant, never shown); user 4 gets 1 (already in training: left out)
-- and 6; user 1 gets 2 (in training: no new item); user 999 is unknown.
CREATE TABLE met_test (user_id bigint, item_id bigint);
INSERT INTO met_test VALUES (5, 3), (5, 8), (5, 99), (4, 1), (4, 6), (1, 2), (999, 4), (5, NULL);
-- By hand at k = 3:
--   user 5: top 3 = 2, 3, 4; relevant {3, 8, 99}; one hit at rank 2.
--     precision 1/3, recall 1/3, DCG = 1/log2(3) = 0.63093,
--     IDCG = 1 + 1/log2(3) + 1/log2(4) = 2.13093, NDCG = 0.29608,
--     AP@3 = (1/2) / min(3, 3) = 0.16667.
--   user 4: top 3 = 3, 4, 6; relevant {6}; hit at rank 3.
--     precision 1/3, recall 1, NDCG = (1/log2(4)) / 1 = 0.5, AP@3 = (1/3) / 1.
--   means over the 2 users: precision 0.33333, recall 0.66667,
--     NDCG 0.39804, MAP 0.25000, hit rate 1; coverage |{2,3,4,6}| / 8 = 0.5.
SELECT key, round(value::numeric, 5) AS value
FROM met_model, jsonb_each_text((SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id, 3)
                                 FROM met_model m, met_test t)) j(key, value)
ORDER BY key;
-- k = 1: user 5 sees 2 (miss), user 4 sees 3 (miss)
SELECT r->'precision' AS precision, r->'hit_rate' AS hit_rate, r->'users' AS users
FROM (SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id, 1) AS r
      FROM met_model m, met_test t) s;
-- default k is 10
SELECT r->'k' AS k FROM (SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id) AS r
                         FROM met_model m, met_test t) s;
-- no rows: NULL
SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id, 3) FROM met_model m, met_test t WHERE false;
-- errors
SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id, -1) FROM met_model m, met_test t;
SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id, 0) FROM met_model m, met_test t;
SELECT affinity.ranking_metrics(m.model, t.user_id, t.item_id, t.user_id::int) FROM met_model m, met_test t;

-- A larger held-out table scanned in parallel gives the same figures.
CREATE TABLE met_buys AS
SELECT u::bigint AS user_id, (abs(hashint4(u * 31 + i)) % 200)::bigint AS item_id, 1::real AS weight
FROM generate_series(1, 2000) u, generate_series(1, 8) i;
CREATE TABLE met_als AS
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 8, "iterations": 3, "threads": 1}') AS model
FROM met_buys;
CREATE TABLE met_held AS
SELECT u::bigint AS user_id, (abs(hashint4(u * 17 + i)) % 200)::bigint AS item_id
FROM generate_series(1, 2000) u, generate_series(1, 3) i;
ANALYZE met_held;
SET max_parallel_workers_per_gather = 0;
CREATE TABLE met_serial AS
SELECT affinity.ranking_metrics(m.model, h.user_id, h.item_id, 10) AS r FROM met_als m, met_held h;
SET max_parallel_workers_per_gather = 2;
SET parallel_setup_cost = 0;
SET parallel_tuple_cost = 0;
SET min_parallel_table_scan_size = 0;
SET parallel_leader_participation = off;
-- the model as an initplan parameter lets each worker aggregate its share
EXPLAIN (COSTS OFF)
SELECT affinity.ranking_metrics((SELECT model FROM met_als), h.user_id, h.item_id, 10) FROM met_held h;
SELECT s.r = p.r AS same_in_parallel, (s.r->>'users')::int AS users
FROM met_serial s,
     (SELECT affinity.ranking_metrics((SELECT model FROM met_als), h.user_id, h.item_id, 10) AS r
      FROM met_held h) p;
RESET max_parallel_workers_per_gather;
RESET parallel_setup_cost;
RESET parallel_tuple_cost;
RESET min_parallel_table_scan_size;
RESET parallel_leader_participation;

-- Tuning by SQL: one model per grid point (CROSS JOIN a grid, GROUP BY its
-- columns), each scored on the same held-out rows
CREATE TABLE met_grid AS
SELECT g.factors, g.regularization,
       affinity.fit(b.user_id, b.item_id, b.weight,
                    jsonb_build_object('factors', g.factors, 'regularization', g.regularization,
                                       'iterations', 3, 'threads', 1)) AS model
FROM met_buys b
CROSS JOIN (VALUES (4, 1.0), (4, 30.0), (8, 30.0)) g(factors, regularization)
GROUP BY g.factors, g.regularization;
SELECT factors, regularization,
       (affinity.describe(model)->'options'->>'factors')::int = factors AS factors_used,
       (affinity.describe(model)->'options'->>'regularization')::float8 = regularization AS regularization_used
FROM met_grid ORDER BY 1, 2;
SELECT g.factors, g.regularization, (affinity.ranking_metrics(g.model, h.user_id, h.item_id, 10))->'users' AS users
FROM met_grid g, met_held h GROUP BY g.factors, g.regularization ORDER BY 1, 2;

-- Rows that bring two models without a GROUP BY are refused: the result
-- would describe the first model alone.  (The detail names the checksums,
-- which change with the fit's timings, so the error is caught and its
-- stable parts shown.)
DO $$
DECLARE
	st text;
	msg text;
	hint text;
BEGIN
	PERFORM affinity.ranking_metrics(g.model, h.user_id, h.item_id, 10) FROM met_grid g, met_held h;
	RAISE NOTICE 'no error: two models were evaluated as one';
EXCEPTION WHEN OTHERS THEN
	GET STACKED DIAGNOSTICS st = RETURNED_SQLSTATE, msg = MESSAGE_TEXT, hint = PG_EXCEPTION_HINT;
	RAISE NOTICE '%: %; hint: %', st, msg, hint;
END $$;
-- the same model from two rows (two stored copies) is one model
CREATE TABLE met_copies AS
SELECT model FROM met_grid WHERE factors = 8
UNION ALL SELECT model FROM met_grid WHERE factors = 8;
SELECT (SELECT affinity.ranking_metrics(c.model, h.user_id, h.item_id, 10)
        FROM met_copies c, met_held h)
     = (SELECT affinity.ranking_metrics(g.model, h.user_id, h.item_id, 10)
        FROM met_grid g, met_held h WHERE g.factors = 8) AS copies_agree;
-- nor is ranking_metrics a window aggregate (its final function sorts its state)
SELECT affinity.ranking_metrics(g.model, h.user_id, h.item_id) OVER (ORDER BY h.user_id) IS NOT NULL
FROM met_grid g, met_held h WHERE g.factors = 8 LIMIT 1;
DROP TABLE met_copies;

-- Text keys: the same data with every key written as text gives the same
-- figures (to 1e-12: users are summed in another order, text order, so the
-- last bits of a mean over about a hundred users may differ).  A popularity model whose items have distinct buyer counts
-- (item i: 3i or 3i - 1 buyers) ranks the same whatever the keys look like;
-- the held-out rows bring unknown users (101-110), items new to the
-- catalogue (31-33), repeated rows and items already bought.
CREATE TABLE met_pop_train AS
SELECT u::bigint AS user_id, i::bigint AS item_id, 1::real AS weight
FROM generate_series(1, 100) u, generate_series(1, 30) i
WHERE (u * 37 + i * 11) % 101 < 3 * i;
SELECT count(DISTINCT n) = 30 AS tie_free
FROM (SELECT count(*) AS n FROM met_pop_train GROUP BY item_id) c;
CREATE FUNCTION met_same(a jsonb, b jsonb) RETURNS boolean LANGUAGE sql AS $$
  SELECT array_agg(x ORDER BY x) = (SELECT array_agg(y ORDER BY y) FROM jsonb_object_keys(b) y)
         AND bool_and(abs((a->>x)::float8 - (b->>x)::float8) <= 1e-12)
  FROM jsonb_object_keys(a) x $$;
CREATE TABLE met_pop_held AS
SELECT u::bigint AS user_id, (1 + abs(hashint4(u * 7 + j)) % 33)::bigint AS item_id
FROM generate_series(1, 110) u, generate_series(1, 4) j;
CREATE TABLE met_pop AS
SELECT b.model AS bigint_model, t.model AS text_model
FROM (SELECT affinity.fit(user_id, item_id, weight, '{"method": "popularity"}') AS model FROM met_pop_train) b,
     (SELECT affinity.fit('u' || user_id, 'item ' || item_id, weight, '{"method": "popularity"}') AS model
      FROM met_pop_train) t;
SELECT affinity.describe(bigint_model)->>'key_type' AS b, affinity.describe(text_model)->>'key_type' AS t FROM met_pop;
SELECT k, met_same(b.r, t.r) AS same, (b.r->>'users')::int AS users, (b.r->>'unknown_users')::int AS unknown,
       round((b.r->>'recall')::numeric, 5) AS recall, round((b.r->>'coverage')::numeric, 5) AS coverage
FROM generate_series(1, 12, 5) k,
     LATERAL (SELECT affinity.ranking_metrics(m.bigint_model, h.user_id, h.item_id, k) AS r
              FROM met_pop m, met_pop_held h) b,
     LATERAL (SELECT affinity.ranking_metrics(m.text_model, 'u' || h.user_id, 'item ' || h.item_id, k) AS r
              FROM met_pop m, met_pop_held h) t
ORDER BY k;
-- in parallel too (texts travel between workers in the serialized state)
SET max_parallel_workers_per_gather = 2;
SET parallel_setup_cost = 0;
SET parallel_tuple_cost = 0;
SET min_parallel_table_scan_size = 0;
SET parallel_leader_participation = off;
CREATE TABLE met_pop_held_text AS
SELECT 'u' || h.user_id AS user_id, 'item ' || h.item_id AS item_id FROM met_held h;
ANALYZE met_pop_held_text;
EXPLAIN (COSTS OFF)
SELECT affinity.ranking_metrics((SELECT text_model FROM met_pop), h.user_id, h.item_id, 10) FROM met_pop_held_text h;
SELECT met_same(p.r, s.r) AS same_in_parallel, (p.r->>'users')::int AS users
FROM (SELECT affinity.ranking_metrics((SELECT text_model FROM met_pop), h.user_id, h.item_id, 10) AS r
      FROM met_pop_held_text h) p,
     (SELECT affinity.ranking_metrics(m.bigint_model, h.user_id, h.item_id, 10) AS r
      FROM met_pop m, met_held h) s;
RESET max_parallel_workers_per_gather;
RESET parallel_setup_cost;
RESET parallel_tuple_cost;
RESET min_parallel_table_scan_size;
RESET parallel_leader_participation;
-- two identical calls share one state: each final call gives the same result
SELECT r1 = r2 AS shared_state_same
FROM (SELECT affinity.ranking_metrics(m.text_model, 'u' || h.user_id, 'item ' || h.item_id, 5) AS r1,
             affinity.ranking_metrics(m.text_model, 'u' || h.user_id, 'item ' || h.item_id, 5) AS r2
      FROM met_pop m, met_pop_held h) s;
-- keys of the other type are refused, with the cast to use
SELECT affinity.ranking_metrics(m.text_model, h.user_id, h.item_id, 5) FROM met_pop m, met_pop_held h;
SELECT affinity.ranking_metrics(m.bigint_model, h.user_id::text, h.item_id::text, 5) FROM met_pop m, met_pop_held h;
DROP TABLE met_pop_train, met_pop_held, met_pop, met_pop_held_text;
DROP FUNCTION met_same(jsonb, jsonb);

-- The held-out statements as the README writes them: one correlated
-- subquery per model over the held-out rows, so that the model is a
-- parameter of the subplan (passed by reference, read once), never a column
-- copied into a Materialize node or a CTE scan for each held-out row.  They
-- give exactly the metrics of models saved into a table first, and of the
-- join form (models joined with the held-out rows); work_mem is lowered
-- below the size of the models so that the join form's copies go to disk.
-- 300 customers, 200 products, 6000 lines over 40 days; the last 10 held out.
CREATE TABLE met_lines AS
SELECT 1 + (g * 7) % 300 AS customer_id,
       1 + ((g * 7) % 300 % 10) * 20 + (g * 13) % 23 % 20 AS product_id,
       1 + g % 3 AS quantity,
       DATE '2025-11-01' + g % 40 AS bought_at
FROM generate_series(1, 6000) g;
ANALYZE met_lines;
SET work_mem = '64kB';
CREATE TABLE met_saved AS
WITH train AS (SELECT * FROM met_lines WHERE bought_at < DATE '2025-12-01'),
     models AS (
       SELECT 'implicit_als' AS method,
              affinity.fit(customer_id, product_id, quantity::real, '{"factors": 8, "iterations": 4, "threads": 1}') AS model FROM train
       UNION ALL
       SELECT 'ease', affinity.fit(customer_id, product_id, quantity::real, '{"method": "ease"}') FROM train
       UNION ALL
       SELECT 'popularity', affinity.fit(customer_id, product_id, quantity::real, '{"method": "popularity"}') FROM train)
SELECT method, model FROM models;
SELECT count(*) AS models, sum(pg_column_size(model)) > 2 * 64 * 1024 AS over_work_mem FROM met_saved;
CREATE TABLE met_by_subquery AS
WITH train AS (SELECT * FROM met_lines WHERE bought_at < DATE '2025-12-01'),
     models AS (
       SELECT 'implicit_als' AS method,
              affinity.fit(customer_id, product_id, quantity::real, '{"factors": 8, "iterations": 4, "threads": 1}') AS model FROM train
       UNION ALL
       SELECT 'ease', affinity.fit(customer_id, product_id, quantity::real, '{"method": "ease"}') FROM train
       UNION ALL
       SELECT 'popularity', affinity.fit(customer_id, product_id, quantity::real, '{"method": "popularity"}') FROM train)
SELECT m.method,
       (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)
          FROM met_lines t WHERE t.bought_at >= DATE '2025-12-01') AS metrics
FROM models m;
CREATE TABLE met_by_join AS
WITH train AS (SELECT * FROM met_lines WHERE bought_at < DATE '2025-12-01'),
     test  AS (SELECT * FROM met_lines WHERE bought_at >= DATE '2025-12-01'),
     models AS (
       SELECT 'implicit_als' AS method,
              affinity.fit(customer_id, product_id, quantity::real, '{"factors": 8, "iterations": 4, "threads": 1}') AS model FROM train
       UNION ALL
       SELECT 'ease', affinity.fit(customer_id, product_id, quantity::real, '{"method": "ease"}') FROM train
       UNION ALL
       SELECT 'popularity', affinity.fit(customer_id, product_id, quantity::real, '{"method": "popularity"}') FROM train)
SELECT m.method, affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10) AS metrics
FROM models m, test t GROUP BY m.method;
SELECT s.method, q.metrics = s.metrics AS subquery_same, j.metrics = s.metrics AS join_same,
       (s.metrics->>'users')::int AS users, (s.metrics->>'recall')::float8 > 0 AS some_recall
FROM (SELECT m.method, affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10) AS metrics
      FROM met_saved m, met_lines t WHERE t.bought_at >= DATE '2025-12-01' GROUP BY m.method) s
     LEFT JOIN met_by_subquery q USING (method) LEFT JOIN met_by_join j USING (method)
ORDER BY s.method;
-- the plan: the fits once each, the held-out scan in a subplan per model row
EXPLAIN (COSTS OFF)
WITH train AS (SELECT * FROM met_lines WHERE bought_at < DATE '2025-12-01'),
     models AS (
       SELECT 'implicit_als' AS method, affinity.fit(customer_id, product_id, quantity::real) AS model FROM train
       UNION ALL
       SELECT 'popularity', affinity.fit(customer_id, product_id, quantity::real, '{"method": "popularity"}') FROM train)
SELECT m.method,
       (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)
          FROM met_lines t WHERE t.bought_at >= DATE '2025-12-01') AS metrics
FROM models m;
-- the grid in the same form: each point equal to its saved model's metrics
CREATE TABLE met_grid_saved AS
WITH grid AS (SELECT * FROM (VALUES (4, 10.0), (8, 30.0)) g(factors, lambda))
SELECT g.factors, g.lambda,
       affinity.fit(p.customer_id, p.product_id, p.quantity::real,
                    jsonb_build_object('factors', g.factors, 'regularization', g.lambda,
                                       'iterations', 4, 'threads', 1)) AS model
FROM met_lines p CROSS JOIN grid g
WHERE p.bought_at < DATE '2025-12-01'
GROUP BY g.factors, g.lambda;
WITH grid AS (SELECT * FROM (VALUES (4, 10.0), (8, 30.0)) g(factors, lambda)),
     models AS (
       SELECT g.factors, g.lambda,
              affinity.fit(p.customer_id, p.product_id, p.quantity::real,
                           jsonb_build_object('factors', g.factors, 'regularization', g.lambda,
                                              'iterations', 4, 'threads', 1)) AS model
       FROM met_lines p CROSS JOIN grid g
       WHERE p.bought_at < DATE '2025-12-01'
       GROUP BY g.factors, g.lambda),
     by_subquery AS (
       SELECT m.factors, m.lambda,
              (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)
                 FROM met_lines t WHERE t.bought_at >= DATE '2025-12-01') AS metrics
       FROM models m)
SELECT b.factors, b.lambda, b.metrics = s.metrics AS same_as_saved
FROM by_subquery b
     JOIN (SELECT m.factors, m.lambda, affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10) AS metrics
           FROM met_grid_saved m, met_lines t WHERE t.bought_at >= DATE '2025-12-01'
           GROUP BY m.factors, m.lambda) s USING (factors, lambda)
ORDER BY b.factors;
-- an altered value is refused in this form too (one byte of the saved
-- implicit_als model flipped, as in the corrupt suite's checksum case), and
-- a second model within one subquery's aggregate is still refused
SELECT (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10) FROM met_lines t)
FROM (SELECT encode(set_byte(b, 3000, 255 - get_byte(b, 3000)), 'base64')::affinity.model AS model
      FROM (SELECT decode(model::text, 'base64') AS b FROM met_saved WHERE method = 'implicit_als') s) m;
DO $$
DECLARE
	st text;
	msg text;
BEGIN
	PERFORM (SELECT affinity.ranking_metrics(CASE WHEN t.bought_at < DATE '2025-11-20' THEN m.model ELSE p.model END,
	                                         t.customer_id, t.product_id, 10)
	           FROM met_lines t WHERE t.bought_at >= DATE '2025-11-15')
	FROM met_saved m, met_saved p WHERE m.method = 'implicit_als' AND p.method = 'popularity';
	RAISE NOTICE 'no error: two models were evaluated as one';
EXCEPTION WHEN OTHERS THEN
	GET STACKED DIAGNOSTICS st = RETURNED_SQLSTATE, msg = MESSAGE_TEXT;
	RAISE NOTICE '%: %', st, msg;
END $$;
RESET work_mem;
DROP TABLE met_lines, met_saved, met_by_subquery, met_by_join, met_grid_saved;
