--
-- Text keys: SKU codes and customer references as text, served with text
-- overloads; mixing key types is a clear error.
--
CREATE TABLE txt_buys AS
SELECT 'C-' || lpad(u::text, 3, '0') AS customer,
       'SKU-' || chr(64 + (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)) AS sku,
       1::real AS qty
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

CREATE TABLE txt AS
SELECT affinity.fit(customer, sku, qty, '{"factors": 2, "iterations": 10, "threads": 1}') AS model
FROM txt_buys;
SELECT d->>'key_type' AS key_type, d->'users' AS users, d->'items' AS items
FROM (SELECT affinity.describe(model) AS d FROM txt) s;

-- C-001 is in the first group (SKU-A .. SKU-L)
SELECT bool_and(item_id <= 'SKU-L') AS own_group, count(*) AS n, pg_typeof(min(item_id)) AS type
FROM txt, affinity.top_items(model, 'C-001', 2);
SELECT array_agg(item_id ORDER BY rank) FROM txt, affinity.top_items(model, 'C-001', 3, candidates => ARRAY['SKU-M', 'SKU-B', 'SKU-Z']);
SELECT count(*) FROM txt, affinity.top_items(model, 'nobody', 3, fallback_popular => false);
SELECT bool_and(item_id <= 'SKU-L') AS own_group FROM txt, affinity.top_items(model, ARRAY['SKU-A', 'SKU-B'], 3);
SELECT bool_and(item_id > 'SKU-L') AS own_group FROM txt, affinity.items_like(model, 'SKU-P', 3);
SELECT bool_and(user_id <= 'C-030') AS own_group FROM txt, affinity.users_like(model, 'C-002', 3);
SELECT affinity.score(model, 'C-001', 'SKU-A') IS NOT NULL AS known,
       affinity.score(model, 'C-001', 'SKU-ZZ') IS NULL AS unknown_item FROM txt;
SELECT count(*) > 0 AS has_reasons,
       bool_and(EXISTS (SELECT 1 FROM txt_buys b WHERE b.customer = 'C-001' AND b.sku = r.past_item_id)) AS from_history
FROM txt, affinity.reasons(model, 'C-001', 'SKU-C', 10) r;
SELECT array_length(affinity.user_vector(model, 'C-010'), 1) AS dims, affinity.item_vector(model, 'nope') IS NULL AS unknown FROM txt;
SELECT count(*) AS users FROM txt, affinity.user_vectors(model, NULL::text[]);
SELECT user_id FROM txt, affinity.user_vectors(model, ARRAY['C-005', 'C-404']);
SELECT count(*) AS items FROM txt, affinity.item_vectors(model, NULL::text[]);
SELECT count(*) AS rows, count(DISTINCT user_id) AS users FROM txt, affinity.top_items_for_all(model, 2, true, NULL::text[]);
SELECT user_id, count(*) FROM txt, affinity.top_items_for_all(model, 2, true, ARRAY['C-001', 'C-059']) GROUP BY 1 ORDER BY 1;
-- the text batch by name: naming only the users keeps every other default
SELECT user_id, count(*), min(source) AS source
FROM txt, affinity.top_items_for_all(model, users => ARRAY['C-001', 'C-059', 'nobody']) GROUP BY 1 ORDER BY 1;
SELECT (SELECT array_agg(user_id || ':' || item_id || ':' || rank ORDER BY user_id, rank)
        FROM txt, affinity.top_items_for_all(model, users => NULL::text[], k => 2))
     = (SELECT array_agg(user_id || ':' || item_id || ':' || rank ORDER BY user_id, rank)
        FROM txt, affinity.top_items_for_all(model, 2, true, NULL::text[])) AS same_as_positional;
SELECT (affinity.describe(affinity.forget_user(model, 'C-001'))->>'users')::int AS users_after_forget FROM txt;
SELECT affinity.user_vector(affinity.forget_user(model, 'C-001'), 'C-001') IS NULL AS forgotten,
       affinity.user_vector(affinity.forget_user(model, 'C-001'), 'C-002') = affinity.user_vector(model, 'C-002') AS others_kept
FROM txt;
-- the text form round-trips and validates the dictionaries
SELECT affinity.describe(model::text::affinity.model)->>'users' FROM txt;
-- empty strings and non-ASCII texts are keys like any other
SELECT array_agg(item_id ORDER BY rank) FROM
  (SELECT affinity.fit(u, i, 1, '{"method": "popularity"}') AS m
   FROM (VALUES ('', 'ça'), ('', 'żółw'), ('x', 'ça')) v(u, i)) s,
  affinity.top_items(m, 'nobody', 5);

-- mixing key types
SELECT * FROM txt, affinity.top_items(model, 1::bigint, 3);
SELECT * FROM txt, affinity.top_items(model, ARRAY[1, 2]::bigint[], 3);
SELECT * FROM txt, affinity.top_items(model, 'C-001', 3, exclude => NULL, candidates => NULL) LIMIT 0;
SELECT * FROM txt, affinity.top_items_for_all(model, 2) LIMIT 1;
SELECT * FROM txt, affinity.user_vectors(model) LIMIT 1;
SELECT affinity.score(model, 1, 2) FROM txt;
SELECT * FROM (SELECT affinity.fit(user_id, item_id, 1, '{"factors": 2, "iterations": 1}') AS m
               FROM (VALUES (1::bigint, 2::bigint)) v(user_id, item_id)) s, affinity.top_items(m, 'C-1', 1);
SELECT affinity.ranking_metrics(model, 1::bigint, 2::bigint, 5) FROM txt;

-- ranking_metrics over text keys: held-out purchases of codes each customer
-- has not bought (in the own group: the model should find them), an unknown
-- customer and a code new to the catalogue
CREATE TABLE txt_held AS
SELECT c.customer, s.sku
FROM (SELECT DISTINCT customer FROM txt_buys) c, (SELECT DISTINCT sku FROM txt_buys) s
WHERE (s.sku <= 'SKU-L') = (c.customer <= 'C-030')
  AND NOT EXISTS (SELECT FROM txt_buys b WHERE b.customer = c.customer AND b.sku = s.sku)
UNION ALL VALUES ('C-999', 'SKU-A'), ('C-001', 'SKU-NEW');
SELECT r->'users' AS users, r->'unknown_users' AS unknown, (r->>'hit_rate')::float8 AS hit_rate,
       (r->>'precision')::float8 > 0.5 AS in_own_group
FROM (SELECT affinity.ranking_metrics(t.model, h.customer, h.sku, 3) AS r FROM txt t, txt_held h) s;
-- untyped literals pick the text overload
SELECT affinity.ranking_metrics(model, 'C-001', 'SKU-B')->'k' AS k FROM txt;
