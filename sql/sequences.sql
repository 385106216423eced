-- Sequences: ordered events (a visit's page views, a customer's orders) into
-- sequential rules, and the next items of a visit.  The shop is the invented
-- Fernhollow General Store: visitors browse lamps, shades and bulbs.
SET extra_float_digits = 0;

CREATE TABLE shop_views (visit bigint, sku bigint, viewed_at timestamptz);
INSERT INTO shop_views VALUES
 -- visit 1: reading lamp, then a linen shade, then a bulb
 (1, 101, '2025-03-01 10:00+00'), (1, 301, '2025-03-01 10:02+00'), (1, 401, '2025-03-01 10:05+00'),
 -- visit 2: the same path, with the bulb twice (a reload: one event)
 (2, 101, '2025-03-01 11:00+00'), (2, 301, '2025-03-01 11:01+00'),
 (2, 401, '2025-03-01 11:03+00'), (2, 401, '2025-03-01 11:03+00'),
 -- visit 3: desk lamp, then shade and bulb in one click (one step), then a kettle
 (3, 102, '2025-03-02 09:00+00'), (3, 301, '2025-03-02 09:04+00'), (3, 401, '2025-03-02 09:04+00'),
 (3, 202, '2025-03-02 09:10+00'),
 -- visit 4: a single view (no transition: counted, not an error)
 (4, 104, '2025-03-02 12:00+00'),
 -- rows with a NULL are skipped and counted
 (5, NULL, '2025-03-03 08:00+00'), (NULL, 101, '2025-03-03 08:00+00'), (5, 101, NULL);

-- rows arrive in any order: the events are sorted by visit, time, item
CREATE TABLE rules AS
SELECT affinity.fit_sequences(visit, sku, viewed_at ORDER BY random()) AS m FROM shop_views;

-- describe() shows what was counted
SELECT d->>'method' AS method, d->>'items' AS items, d->>'rows_read' AS rows_read,
       d->>'rows_skipped_null' AS skipped_null, d->>'duplicates_summed' AS repeats,
       d->'sequences' AS sequences
  FROM (SELECT affinity.describe(m) AS d FROM rules) x;

-- the successors of the reading lamp: the shade one step later (1), the bulb
-- two steps later (1/2), twice each
SELECT * FROM affinity.items_like((SELECT m FROM rules), 101);
-- the shade: the bulb follows it in visits 1 and 2; in visit 3 they are one step
SELECT * FROM affinity.items_like((SELECT m FROM rules), 301);

-- the next items of a visit that viewed the desk lamp, then the shade: the
-- last item counts fully, the one before it half
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[102, 301]::bigint[]);
-- k, exclude and candidates
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[102, 301]::bigint[], 1);
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[102, 301]::bigint[], exclude => ARRAY[401]::bigint[]);
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[101]::bigint[], candidates => ARRAY[401, 202]::bigint[]);
-- positions: equal positions are one step (both items count fully)
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[101, 102]::bigint[], positions => ARRAY[7, 7]::bigint[]);
-- unknown items take their step but add nothing; NULL elements take none
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[101, 999, NULL]::bigint[]);
-- nothing follows the kettle
SELECT count(*) FROM affinity.next_items((SELECT m FROM rules), ARRAY[202]::bigint[]);

-- many visits at once: the events of each as two arrays in one order
WITH today(visit, sku, at) AS (VALUES (71, 101, 1), (72, 102, 1), (71, 301, 2), (72, 999, 2))
SELECT n.*
  FROM (SELECT array_agg(visit ORDER BY at) AS v, array_agg(sku ORDER BY at) AS s FROM today) t,
       affinity.next_items_for_all((SELECT m FROM rules), t.v, t.s, 2) n;

-- text keys and integer positions (seconds; an integer column is cast to bigint)
CREATE TABLE text_rules AS
SELECT affinity.fit_sequences('visit-' || visit, 'FH-' || sku, extract(epoch FROM viewed_at)::integer,
                              '{"window": 1, "successors": 1}') AS m
  FROM shop_views;
SELECT d->>'key_type' AS key_type, d->'sequences'->>'window' AS window,
       d->'sequences'->>'rules' AS rules, d->'sequences'->>'rules_kept' AS kept,
       d->'sequences'->>'position' AS position
  FROM (SELECT affinity.describe(m) AS d FROM text_rules) x;
SELECT * FROM affinity.next_items((SELECT m FROM text_rules), ARRAY['FH-101']);
SELECT * FROM affinity.next_items_for_all((SELECT m FROM text_rules), ARRAY['a', 'b'], ARRAY['FH-101', 'FH-301']);

-- the value round-trips through its text form
SELECT (m::text::affinity.model)::text = m::text AS round_trip FROM rules;

-- this should fail: serving functions of users refuse rules, next_items
-- refuses other methods, key types must match
SELECT * FROM affinity.top_items((SELECT m FROM rules), 1::bigint);
SELECT * FROM affinity.top_items((SELECT m FROM rules), ARRAY[101]::bigint[]);
SELECT affinity.score((SELECT m FROM rules), 1::bigint, 101::bigint);
SELECT * FROM affinity.next_items((SELECT affinity.fit(visit, sku, 1, '{"method": "popularity"}') FROM shop_views), ARRAY[101]::bigint[]);
SELECT * FROM affinity.next_items((SELECT m FROM text_rules), ARRAY[101]::bigint[]);
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[[101, 301]]::bigint[]);
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[101, 301]::bigint[], positions => ARRAY[1]::bigint[]);
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[101, 301]::bigint[], positions => ARRAY[1, NULL]::bigint[]);
SELECT * FROM affinity.next_items((SELECT m FROM rules), ARRAY[101]::bigint[], -1);
SELECT * FROM affinity.next_items_for_all((SELECT m FROM rules), ARRAY[1, 2]::bigint[], ARRAY[101]::bigint[]);

-- this should fail: options, empty and unusable input, no transition at all
SELECT affinity.fit_sequences(visit, sku, viewed_at, '{"window": 0}') FROM shop_views;
SELECT affinity.fit_sequences(visit, sku, viewed_at, '{"successors": 1.5}') FROM shop_views;
SELECT affinity.fit_sequences(visit, sku, viewed_at, '{"factors": 8}') FROM shop_views;
SELECT affinity.fit_sequences(visit, sku, viewed_at, '{"method": "implicit_als"}') FROM shop_views;
SELECT affinity.fit_sequences(visit, sku, viewed_at, '[1]') FROM shop_views;
SELECT affinity.fit_sequences(visit, sku, viewed_at) FROM shop_views WHERE false;
SELECT affinity.fit_sequences(visit, sku, viewed_at) FROM shop_views WHERE sku IS NULL;
SELECT affinity.fit_sequences(visit, sku, 1) FROM shop_views;
SELECT affinity.fit_sequences(visit, sku, viewed_at::date::text) FROM shop_views;
