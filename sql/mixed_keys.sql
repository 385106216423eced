--
-- Mixed keys: loyalty-card numbers (bigint) with product codes (text), and
-- account handles (text) with catalogue numbers (bigint).  Keys are checked
-- per side; the text forms serve every model with a text side.
--
CREATE TABLE mix_buys AS
SELECT 17000 + u AS card, 'SKU-' || chr(64 + (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)) AS sku,
       'acct-' || lpad(u::text, 3, '0') AS handle, (100 + CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS article,
       1::real AS qty
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

CREATE TABLE bt AS
SELECT affinity.fit(card, sku, qty, '{"factors": 2, "iterations": 10, "threads": 1}') AS model
FROM mix_buys;
CREATE TABLE tb AS
SELECT affinity.fit(handle, article, qty, '{"factors": 2, "iterations": 10, "threads": 1}') AS model
FROM mix_buys;
-- without options, too
SELECT affinity.describe(affinity.fit(card, sku, qty))->>'key_type' AS bigint_text,
       affinity.describe(affinity.fit(handle, article, qty))->>'key_type' AS text_bigint
FROM mix_buys;
SELECT d->>'key_type' AS key_type, d->'users' AS users, d->'items' AS items,
       (SELECT array_agg(k ORDER BY k) FROM jsonb_object_keys(d->'sections') k
        WHERE k LIKE '%text%') AS text_sections
FROM (SELECT affinity.describe(model) AS d FROM bt UNION ALL SELECT affinity.describe(model) FROM tb) s
ORDER BY 1;
SELECT affinity.model_key_types(bt.model) AS bt, affinity.model_key_types(tb.model) AS tb FROM bt, tb;

-- bigint users, text items: user 17001 is in the first group (SKU-A .. SKU-L)
-- and has two items of it left to buy
SELECT bool_and(item_id <= 'SKU-L') AS own_group, count(*) AS n, pg_typeof(min(item_id)) AS type
FROM bt, affinity.top_items(model, 17001::text, 2);
-- a key of the bigint side as text: canonical decimals only
SELECT count(*) AS n FROM bt, affinity.top_items(model, '017001', 3, fallback_popular => false);
SELECT count(*) AS n FROM bt, affinity.top_items(model, ' 17001', 3, fallback_popular => false);
SELECT count(*) AS n FROM bt, affinity.top_items(model, '+17001', 3, fallback_popular => false);
SELECT count(*) AS n FROM bt, affinity.top_items(model, '99999999999999999999', 3, fallback_popular => false);
SELECT count(*) AS n FROM bt, affinity.top_items(model, '17001', 3, fallback_popular => false);
SELECT array_agg(item_id ORDER BY rank) FROM bt, affinity.top_items(model, 17001::text, 3, candidates => ARRAY['SKU-M', 'SKU-B', 'SKU-Z']);
SELECT bool_and(item_id <= 'SKU-L') AS own_group FROM bt, affinity.top_items(model, ARRAY['SKU-A', 'SKU-B'], 3);
SELECT bool_and(item_id > 'SKU-L') AS own_group FROM bt, affinity.items_like(model, 'SKU-P', 3);
-- users_like with a bigint user returns bigint users; its text form text ones
SELECT bool_and(user_id <= 17030) AS own_group, pg_typeof(min(user_id)) AS type FROM bt, affinity.users_like(model, 17002, 3);
SELECT bool_and(user_id::bigint <= 17030) AS own_group, pg_typeof(min(user_id)) AS type FROM bt, affinity.users_like(model, '17002', 3);
SELECT affinity.score(model, 17001, 'SKU-A') IS NOT NULL AS known,
       affinity.score(model, 17001, 'SKU-A') = affinity.score(model, '17001', 'SKU-A') AS text_form_same,
       affinity.score(model, 17001, 'SKU-ZZ') IS NULL AS unknown_item,
       affinity.score(model, 16999, 'SKU-A') IS NULL AS unknown_user FROM bt;
SELECT count(*) > 0 AS has_reasons, pg_typeof(min(r.past_item_id)) AS type,
       bool_and(EXISTS (SELECT 1 FROM mix_buys b WHERE b.card = 17001 AND b.sku = r.past_item_id)) AS from_history
FROM bt, affinity.reasons(model, 17001, 'SKU-C', 10) r;
SELECT array_length(affinity.user_vector(model, 17010), 1) AS dims,
       affinity.user_vector(model, 17010) = affinity.user_vector(model, '17010') AS text_form_same,
       affinity.item_vector(model, 'nope') IS NULL AS unknown FROM bt;
SELECT count(*) AS users, pg_typeof(min(user_id)) AS type FROM bt, affinity.user_vectors(model);
SELECT user_id FROM bt, affinity.user_vectors(model, ARRAY['17005', '404']);
SELECT count(*) AS items FROM bt, affinity.item_vectors(model, NULL::text[]);
SELECT count(*) AS rows, count(DISTINCT user_id) AS users, pg_typeof(min(user_id)) AS type
FROM bt, affinity.top_items_for_all(model, 2, true, NULL::text[]);
SELECT user_id, count(*) FROM bt, affinity.top_items_for_all(model, 2, true, ARRAY['17001', '17059']) GROUP BY 1 ORDER BY 1;
-- the batch's text keys are the model's: each row's score is score()'s
-- for its user and item (a wrong key would find another pair or none)
CREATE TABLE bt8 AS
SELECT affinity.fit(card, sku, qty, '{"factors": 8, "iterations": 10, "threads": 1}') AS model FROM mix_buys;
SELECT count(*) AS rows, count(DISTINCT t.user_id) AS users,
       count(*) FILTER (WHERE abs(t.score - affinity.score(model, t.user_id::bigint, t.item_id)) > 1e-5) AS off
FROM bt8, affinity.top_items_for_all(model, 3, true, NULL::text[]) t;

-- text users, bigint items: the bigint side in bigint calls, every side in text ones
SELECT bool_and(item_id::bigint <= 112) AS own_group, pg_typeof(min(item_id)) AS type
FROM tb, affinity.top_items(model, 'acct-001', 2);
SELECT bool_and(item_id <= 112) AS own_group, pg_typeof(min(item_id)) AS type
FROM tb, affinity.top_items(model, ARRAY[101, 102]::bigint[], 3);
SELECT bool_and(item_id::bigint <= 112) AS own_group, pg_typeof(min(item_id)) AS type
FROM tb, affinity.top_items(model, ARRAY['101', '102'], 3);
SELECT bool_and(item_id > 112) AS own_group, pg_typeof(min(item_id)) AS type FROM tb, affinity.items_like(model, 116, 3);
SELECT bool_and(user_id <= 'acct-030') AS own_group FROM tb, affinity.users_like(model, 'acct-002', 3);
SELECT affinity.score(model, 'acct-001', 101) IS NOT NULL AS known,
       affinity.score(model, 'acct-001', 101) = affinity.score(model, 'acct-001', '101') AS text_form_same FROM tb;
SELECT count(*) > 0 AS has_reasons, pg_typeof(min(r.past_item_id)) AS type,
       bool_and(EXISTS (SELECT 1 FROM mix_buys b WHERE b.handle = 'acct-001' AND b.article = r.past_item_id)) AS from_history
FROM tb, affinity.reasons(model, 'acct-001', 103, 10) r;
SELECT count(*) AS items, pg_typeof(min(item_id)) AS type FROM tb, affinity.item_vectors(model);
SELECT count(*) AS rows, pg_typeof(min(item_id)) AS type
FROM tb, affinity.top_items_for_all(model, 2, true, ARRAY['acct-001', 'acct-002']);

-- ranking metrics: the mixed overloads, and the text form, give the same figures
-- held out: the pairs of each user's own group that training lacks
CREATE TABLE mix_heldout AS
SELECT 17000 + u AS card, 'SKU-' || chr(64 + (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)) AS sku,
       'acct-' || lpad(u::text, 3, '0') AS handle, (100 + CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS article
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 >= 55;
SELECT affinity.ranking_metrics((SELECT model FROM bt), card, sku, 3)
       = affinity.ranking_metrics((SELECT model FROM bt), card::text, sku, 3) AS same_bt,
       affinity.ranking_metrics((SELECT model FROM tb), handle, article, 3)
       = affinity.ranking_metrics((SELECT model FROM tb), handle, article::text, 3) AS same_tb,
       (affinity.ranking_metrics((SELECT model FROM bt), card, sku, 3)->>'users')::int AS users,
       (affinity.ranking_metrics((SELECT model FROM bt), card, sku)->>'k')::int AS default_k
FROM mix_heldout;

-- forget_user: through the bigint overload on a bigint user side
SELECT (affinity.describe(affinity.forget_user(model, 17001))->>'users')::int AS users_after_forget,
       affinity.user_vector(affinity.forget_user(model, 17001), 17001) IS NULL AS forgotten,
       affinity.user_vector(affinity.forget_user(model, '17001'), 17002) = affinity.user_vector(model, 17002) AS others_kept,
       affinity.describe(affinity.forget_user(model, 17001))->>'key_type' AS key_type
FROM bt;
SELECT (affinity.describe(affinity.forget_user(model, 'acct-001'))->>'users')::int AS users_after_forget FROM tb;

-- model I/O: the text form gives the same value back
SELECT affinity.describe((model::text)::affinity.model)->>'fingerprint' = affinity.describe(model)->>'fingerprint' AS same,
       affinity.describe((model::text)::affinity.model)->>'key_type' AS key_type FROM bt
UNION ALL
SELECT affinity.describe((model::text)::affinity.model)->>'fingerprint' = affinity.describe(model)->>'fingerprint',
       affinity.describe((model::text)::affinity.model)->>'key_type' FROM tb;

-- parallel input: workers' states (each with its own hash key for the text
-- side) are combined; the model holds the same keys, counts and scores as
-- a serial fit (popularity: buyer counts, exact)
CREATE TABLE mix_many AS
SELECT (abs(hashint4(g)) % 3000)::bigint AS card, 'P-' || (abs(hashint4(g * 7 + 1)) % 300) AS code,
       (1 + g % 4)::real AS weight
FROM generate_series(1, 60000) g;
ANALYZE mix_many;
SET max_parallel_workers_per_gather = 0;
CREATE TABLE mix_serial AS
SELECT affinity.fit(card, code, weight, '{"method": "popularity"}') AS m,
       affinity.fit(code, card, weight, '{"method": "popularity"}') AS r
FROM mix_many;
SET max_parallel_workers_per_gather = 2;
SET parallel_setup_cost = 0;
SET parallel_tuple_cost = 0;
SET min_parallel_table_scan_size = 0;
SET parallel_leader_participation = off;
EXPLAIN (COSTS OFF)
SELECT affinity.fit(card, code, weight, '{"method": "popularity"}') FROM mix_many;
CREATE TABLE mix_parallel AS
SELECT affinity.fit(card, code, weight, '{"method": "popularity"}') AS m,
       affinity.fit(code, card, weight, '{"method": "popularity"}') AS r
FROM mix_many;
RESET max_parallel_workers_per_gather;
RESET parallel_setup_cost;
RESET parallel_tuple_cost;
RESET min_parallel_table_scan_size;
RESET parallel_leader_participation;
SELECT d.k, s.d->d.k = p.d->d.k AS same
FROM (SELECT affinity.describe(m) AS d FROM mix_serial) s, (SELECT affinity.describe(m) AS d FROM mix_parallel) p,
     unnest(ARRAY['key_type', 'users', 'items', 'interactions', 'rows_read', 'duplicates_summed']) d(k)
ORDER BY d.k;
SELECT count(*) AS pairs,
       count(*) FILTER (WHERE affinity.score(s.m, c.card, c.code) IS DISTINCT FROM affinity.score(p.m, c.card, c.code)) AS differing,
       count(*) FILTER (WHERE affinity.score(s.r, c.code, c.card) IS DISTINCT FROM affinity.score(p.r, c.code, c.card)) AS differing_reverse
FROM mix_serial s, mix_parallel p, (SELECT DISTINCT card, code FROM mix_many WHERE card < 200) c;
-- equal buyer counts are ranked by the items' index, which follows the
-- text side's hash key: compare scores by rank
SELECT count(*) AS differing FROM (
  SELECT score, rank FROM mix_serial s, affinity.top_items(s.m, 17::text, 20)
  EXCEPT SELECT score, rank FROM mix_parallel p, affinity.top_items(p.m, 17::text, 20)) d;

-- this should fail: bigint calls whose keys are text on the model's side,
-- with the call that works in the hint
SELECT * FROM bt, affinity.top_items(model, 17001);
SELECT * FROM bt, affinity.top_items(model, 17001, 5, exclude => ARRAY[1, 2]::bigint[]);
SELECT * FROM bt, affinity.top_items_for_all(model, 10);
SELECT * FROM bt, affinity.items_like(model, 5);
SELECT affinity.score(model, 17001, 5) FROM bt;
SELECT * FROM bt, affinity.reasons(model, 17001, 5);
SELECT * FROM bt, affinity.item_vectors(model);
SELECT * FROM tb, affinity.top_items(model, 17001);
SELECT * FROM tb, affinity.users_like(model, 17001);
SELECT affinity.forget_user(model, 17001) FROM tb;
SELECT affinity.ranking_metrics(model, card, article) FROM bt, mix_buys;
SELECT affinity.ranking_metrics(model, card, sku) FROM tb, mix_buys;
-- a pure model keeps refusing the other key type
SELECT * FROM affinity.top_items((SELECT affinity.fit(card, article, qty) FROM mix_buys), 'x');
SELECT * FROM affinity.top_items((SELECT affinity.fit(handle, sku, qty) FROM mix_buys), 17001);
-- fit takes no numeric or float ids: cast them (::bigint or ::text)
SELECT affinity.fit(card::numeric, sku, qty) FROM mix_buys;
-- and it gets no overload for them: integer ids would then match both
-- fit(bigint, bigint, real) and fit(numeric, numeric, real), and PostgreSQL
-- could not choose (tried here inside a transaction that is rolled back)
BEGIN;
CREATE FUNCTION pg_temp.numeric_ids_step(numeric, numeric, numeric, real) RETURNS numeric
	LANGUAGE sql AS 'SELECT $1';
CREATE AGGREGATE affinity.fit(numeric, numeric, real) (SFUNC = pg_temp.numeric_ids_step, STYPE = numeric);
SELECT affinity.fit(u, i, 1::real) FROM (VALUES (1, 2)) v(u, i);
ROLLBACK;
