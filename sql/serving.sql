--
-- Serving: top_items, items_like, score, vectors, describe, runtime.
--
SET extra_float_digits = 0;

CREATE TABLE srv_buys AS
SELECT u::bigint AS user_id,
       (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS item_id,
       (1 + (u * i) % 3)::real AS weight
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

CREATE TABLE srv AS
SELECT affinity.fit(user_id, item_id, weight,
                    '{"factors": 2, "iterations": 10, "threads": 1}') AS model
FROM srv_buys;

-- user 1 is in the first group: the first-group items it has not bought
-- rank above every second-group item, and nothing it bought comes back
SELECT max(t.rank) FILTER (WHERE t.item_id <= 12) < min(t.rank) FILTER (WHERE t.item_id > 12) AS own_group_first,
       count(*) FILTER (WHERE t.item_id <= 12) AS own_group_unseen,
       bool_and(NOT EXISTS (SELECT 1 FROM srv_buys b WHERE b.user_id = 1 AND b.item_id = t.item_id)) AS unseen,
       array_agg(t.rank ORDER BY t.rank) AS ranks
FROM srv, affinity.top_items(model, 1, 24) t;
-- the same for every user of both groups
SELECT count(*) AS users_checked,
       count(*) FILTER (WHERE ok) AS own_group_first
FROM (SELECT u, coalesce(max(t.rank) FILTER (WHERE (t.item_id <= 12) = (u <= 30)), 0)
                < coalesce(min(t.rank) FILTER (WHERE (t.item_id <= 12) <> (u <= 30)), 99) AS ok
      FROM srv, generate_series(1, 60) u, affinity.top_items(model, u, 24) t GROUP BY u) s;
SELECT bool_and(a.score >= b.score) AS scores_fall
FROM srv, affinity.top_items(model, 1, 12) a, affinity.top_items(model, 1, 12) b
WHERE b.rank = a.rank + 1;

-- scores are the model's scores
SELECT bool_and(abs(t.score - affinity.score(model, 1, t.item_id)) < 1e-6) AS consistent
FROM srv, affinity.top_items(model, 1, 10) t;

-- exclude_seen => false brings the bought items back
SELECT count(*) FILTER (WHERE EXISTS (SELECT 1 FROM srv_buys b WHERE b.user_id = 1 AND b.item_id = t.item_id)) > 0
       AS has_seen
FROM srv, affinity.top_items(model, 1, 24, exclude_seen => false) t;
-- k larger than the catalogue: every unseen item once
SELECT count(*) AS n, count(DISTINCT item_id) AS distinct_items,
       24 - (SELECT count(*) FROM srv_buys WHERE user_id = 1) AS expected
FROM srv, affinity.top_items(model, 1, 1000000) t;
-- k = 0
SELECT count(*) FROM srv, affinity.top_items(model, 1, 0);
-- exclude and candidates
SELECT array_agg(item_id ORDER BY rank) AS top3 FROM srv, affinity.top_items(model, 1, 3);
SELECT bool_and(item_id NOT IN (SELECT item_id FROM srv, affinity.top_items(model, 1, 2))) AS excluded
FROM srv, affinity.top_items(model, 1, 3,
       exclude => (SELECT array_agg(item_id) FROM srv, affinity.top_items(model, 1, 2)));
SELECT array_agg(item_id ORDER BY rank) AS restricted
FROM srv, affinity.top_items(model, 1, 10, candidates => ARRAY[13, 14, 2, 999, NULL, 13]);
-- candidates plus exclude
SELECT array_agg(item_id ORDER BY rank) AS restricted
FROM srv, affinity.top_items(model, 1, 10, candidates => ARRAY[13, 14, 15], exclude => ARRAY[14]);

-- an unknown user gets the best sellers, or nothing
SELECT array_agg(t.item_id ORDER BY t.rank) = (
         SELECT array_agg(item_id ORDER BY n DESC, item_id) FROM
           (SELECT item_id, count(*) AS n FROM srv_buys GROUP BY item_id ORDER BY n DESC, item_id LIMIT 5) s)
       AS popular_fallback
FROM srv, affinity.top_items(model, -1, 5) t;
SELECT count(*) FROM srv, affinity.top_items(model, -1, 5, fallback_popular => false);
-- the source column says where each row came from: the user's own scores,
-- or the popular items for a user the model does not know
SELECT source, count(*) FROM srv, affinity.top_items(model, 1, 5) GROUP BY 1;
SELECT source, count(*) FROM srv, affinity.top_items(model, -1, 5) GROUP BY 1;
-- NULL model or key: no rows (nothing to serve, as a strict function
-- gives); NULL for a setting (k, exclude_seen, fallback_popular): an error,
-- since no setting is assumed silently
SELECT count(*) FROM affinity.top_items(NULL::affinity.model, 1);
SELECT count(*) FROM srv, affinity.top_items(model, NULL::bigint);
SELECT count(*) FROM srv, affinity.top_items(model, 1, k => NULL);
SELECT count(*) FROM srv, affinity.top_items(model, 1, exclude_seen => NULL);
SELECT count(*) FROM srv, affinity.top_items(model, 1, fallback_popular => NULL);

-- items like item 1 are first-group items, by cosine
SELECT bool_and(item_id BETWEEN 2 AND 12) AS own_group, count(*) AS n,
       bool_and(similarity BETWEEN -1.0001 AND 1.0001) AS in_range
FROM srv, affinity.items_like(model, 1, 5);
SELECT count(*) FROM srv, affinity.items_like(model, 1, 100);
SELECT count(*) FROM srv, affinity.items_like(model, 12345, 5);
SELECT array_agg(item_id ORDER BY rank) FROM srv, affinity.items_like(model, 1, 5, candidates => ARRAY[1, 13, 2]);
-- cosine by hand from the exported vectors
SELECT bool_and(abs(l.similarity - (
         SELECT sum(a * b) / sqrt(sum(a * a) * sum(b * b))
         FROM unnest(affinity.item_vector(model, 1), affinity.item_vector(model, l.item_id)) v(a, b))) < 1e-5)
       AS cosine_by_hand
FROM srv, affinity.items_like(model, 1, 5) l;

-- score: a dot product of the two vectors; NULL when unknown
SELECT abs(affinity.score(model, 1, 3) - (
         SELECT sum(a * b) FROM unnest(affinity.user_vector(model, 1), affinity.item_vector(model, 3)) v(a, b)))
       < 1e-5 AS dot_product
FROM srv;
SELECT affinity.score(model, -1, 3) AS unknown_user, affinity.score(model, 1, -3) AS unknown_item FROM srv;

-- vectors
SELECT count(*) AS users, min(array_length(vector, 1)) AS dims FROM srv, affinity.user_vectors(model);
SELECT count(*) AS items, max(array_length(vector, 1)) AS dims FROM srv, affinity.item_vectors(model);
SELECT affinity.user_vector(model, -5) IS NULL AS unknown FROM srv;
SELECT array_length(affinity.item_vector(model, 24), 1) FROM srv;

-- a stored model is read once per query for a LATERAL over users
SELECT count(*) AS rows FROM srv, generate_series(1, 60) u, affinity.top_items(model, u, 3);

-- popularity models serve top_items and score, not factor functions
CREATE TABLE srv_pop AS
SELECT affinity.fit(user_id, item_id, weight, '{"method": "popularity"}') AS model FROM srv_buys;
SELECT count(*) AS n, bool_and(NOT EXISTS (SELECT 1 FROM srv_buys b WHERE b.user_id = 1 AND b.item_id = t.item_id)) AS unseen,
       min(source) AS source
FROM srv_pop, affinity.top_items(model, 1, 5) t;
SELECT affinity.score(model, 1, 3) AS buyers_of_3 FROM srv_pop;
SELECT * FROM srv_pop, affinity.items_like(model, 1, 5);
SELECT affinity.user_vector(model, 1) FROM srv_pop;

-- rules on top of scores: at most N per group (groups: item key -> name),
-- and a diversity re-ranking (MMR; its arithmetic is checked against a
-- numpy version of the published rule in tests/check_rules_mmr.py)
CREATE TABLE srv_groups AS
SELECT jsonb_object_agg(i::text, CASE WHEN i % 2 = 0 THEN 'even' ELSE 'odd' END) AS groups
FROM generate_series(1, 24) i;
SELECT count(*) AS n, count(*) FILTER (WHERE item_id % 2 = 0) AS even, count(*) FILTER (WHERE item_id % 2 = 1) AS odd
FROM srv, srv_groups g,
     affinity.top_items(model, 1, 6, rules => jsonb_build_object('max_per_group', 2, 'groups', g.groups));
-- the capped list is the plain list with the items of full groups passed over
SELECT (SELECT array_agg(item_id ORDER BY rank) FROM srv, srv_groups g,
          affinity.top_items(model, 1, 4, rules => jsonb_build_object('max_per_group', 2, 'groups', g.groups)))
     = (SELECT array_agg(item_id ORDER BY rank) FROM (
          SELECT item_id, rank, row_number() OVER (PARTITION BY item_id % 2 ORDER BY rank) AS nth
          FROM srv, affinity.top_items(model, 1, 24) t) p WHERE nth <= 2 AND rank <= 100
        ) AS same_as_sql_cap;
-- with diversity the first item is still the best-scored one; the rows keep
-- their own scores and ranks run 1..k
SELECT (array_agg(item_id ORDER BY rank))[1] = (SELECT item_id FROM srv, affinity.top_items(model, 1, 1)) AS first_kept,
       array_agg(rank ORDER BY rank) AS ranks,
       bool_and(abs(score - affinity.score(model, 1, item_id)) < 1e-6) AS own_scores
FROM srv, affinity.top_items(model, 1, 5, rules => '{"diversity": 0.7}');
-- a basket too
SELECT count(*) FILTER (WHERE item_id % 2 = 0) <= 1 AND count(*) FILTER (WHERE item_id % 2 = 1) <= 1 AS capped
FROM srv, srv_groups g,
     affinity.top_items(model, ARRAY[1, 2]::bigint[], 5, rules => jsonb_build_object('max_per_group', 1, 'groups', g.groups));
-- bad rules
SELECT * FROM srv, affinity.top_items(model, 1, 5, rules => '{"per_group": 2}');
SELECT * FROM srv, affinity.top_items(model, 1, 5, rules => '{"max_per_group": 2}');
SELECT * FROM srv, affinity.top_items(model, 1, 5, rules => '{"diversity": 1.5}');
SELECT * FROM srv, affinity.top_items(model, 1, 5, rules => '[1, 2]');
SELECT * FROM srv, affinity.top_items(model, 1, 5, rules => '{"max_per_group": 1, "groups": {"1": 7}}');
SELECT * FROM srv_pop, affinity.top_items(model, 1, 5, rules => '{"diversity": 0.5}');

-- runtime reports the BLAS kernel
SELECT r ? 'blas_core' AS has_core, r->>'blas' AS blas, (r->>'online_cpus')::int >= 1 AS cpus,
       r->>'version' AS version
FROM (SELECT affinity.runtime() AS r) s;
