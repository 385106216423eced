--
-- Item-item methods: ease (Steck 2019, closed form) and item_knn (cosine
-- neighbours of the confidence-weighted matrix), fitted and served.
--
SET extra_float_digits = 0;

-- two planted groups: users 1-30 buy among items 1-12, users 31-60 among
-- items 13-24, so no item of one group shares a user with the other
CREATE TABLE mth_buys AS
SELECT u::bigint AS user_id,
       (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS item_id,
       (1 + (u * i) % 3)::real AS weight
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

CREATE TABLE mth AS
SELECT affinity.fit(user_id, item_id, weight, '{"method": "ease", "threads": 1}') AS ease,
       affinity.fit(user_id, item_id, weight,
                    '{"method": "item_knn", "neighbors": 5, "threads": 1}') AS knn,
       affinity.fit(user_id, item_id, weight,
                    '{"method": "item_knn", "neighbors": 5, "threads": 2}') AS knn_2threads,
       affinity.fit(user_id, item_id, weight,
                    '{"method": "item_knn", "neighbors": 1000, "threads": 1}') AS knn_all
FROM mth_buys;
CREATE VIEW mth_models AS
SELECT 'ease' AS method, ease AS model FROM mth
UNION ALL
SELECT 'item_knn', knn_all FROM mth;

-- describe: the method and the options it used
SELECT method, d->'users' AS users, d->'items' AS items, d->'interactions' AS interactions,
       d->'options' AS options
FROM mth_models, affinity.describe(model) d ORDER BY method;

-- top_items: the unseen items of the user's own group come first, and
-- nothing the user bought comes back
SELECT method,
       max(t.rank) FILTER (WHERE t.item_id <= 12) < min(t.rank) FILTER (WHERE t.item_id > 12) AS own_group_first,
       count(*) FILTER (WHERE t.item_id <= 12) AS own_group_unseen,
       bool_and(NOT EXISTS (SELECT 1 FROM mth_buys b WHERE b.user_id = 1 AND b.item_id = t.item_id)) AS unseen
FROM mth_models, affinity.top_items(model, 1, 24) t GROUP BY method ORDER BY method;
-- the same for every user of both groups
SELECT method, count(*) AS users_checked, count(*) FILTER (WHERE ok) AS own_group_first
FROM (SELECT method, u,
             coalesce(max(t.rank) FILTER (WHERE (t.item_id <= 12) = (u <= 30)), 0)
             < coalesce(min(t.rank) FILTER (WHERE (t.item_id <= 12) <> (u <= 30)), 99) AS ok
      FROM mth_models, generate_series(1, 60) u, affinity.top_items(model, u, 24) t
      GROUP BY method, u) s
GROUP BY method ORDER BY method;
-- with 5 neighbours per item, item_knn scores only the items that the
-- user's items list: all of them own-group, fewer than with every neighbour
SELECT count(*) FILTER (WHERE (t.item_id <= 12) <> (u <= 30)) AS other_group_scored,
       count(*) AS scored_5,
       (SELECT count(*) FROM mth, generate_series(1, 60) u, affinity.top_items(knn_all, u, 24) t
        WHERE t.score > 0) AS scored_all
FROM mth, generate_series(1, 60) u, affinity.top_items(knn, u, 24) t WHERE t.score > 0;
-- the other group scores exactly 0: no shared user, no weight
SELECT method, bool_and(t.score = 0) AS other_group_zero
FROM mth_models, affinity.top_items(model, 1, 24) t WHERE t.item_id > 12
GROUP BY method ORDER BY method;

-- score: what top_items ranks by, and the sum of the weights that the
-- user's training items give the item (items_like lists those weights)
SELECT method, bool_and(abs(t.score - affinity.score(model, 1, t.item_id)) < 1e-6) AS consistent
FROM mth_models, affinity.top_items(model, 1, 10) t GROUP BY method ORDER BY method;
SELECT method,
       bool_and(abs(affinity.score(model, 1, j) - coalesce(
         (SELECT sum(l.similarity) FROM mth_buys b, affinity.items_like(model, b.item_id, 24) l
          WHERE b.user_id = 1 AND l.item_id = j), 0)) < 1e-5) AS sum_of_weights
FROM mth_models, generate_series(1, 24) j GROUP BY method ORDER BY method;
SELECT method, affinity.score(model, -1, 3) AS unknown_user, affinity.score(model, 1, -3) AS unknown_item
FROM mth_models ORDER BY method;

-- items_like: by the learned weights; item_knn lists at most the kept
-- neighbours, all with a positive similarity (models: ease, and item_knn
-- keeping every neighbour)
SELECT method, count(*) AS n, bool_and(l.item_id BETWEEN 2 AND 12) AS own_group,
       bool_and(l.similarity > 0) AS positive
FROM mth_models, affinity.items_like(model, 1, 5) l GROUP BY method ORDER BY method;
SELECT count(*) AS kept_of_10 FROM mth, affinity.items_like(knn, 1, 10);
SELECT count(*) AS all_co_bought FROM mth, affinity.items_like(knn_all, 1, 100);
SELECT count(*) FROM mth, affinity.items_like(knn, 12345, 5);
-- item_knn similarity is the cosine of the confidence columns, c = 1 + 10 ln(1 + w)
WITH c AS (SELECT user_id, item_id, 1 + 10 * ln(1 + weight) AS c FROM mth_buys)
SELECT count(*) AS n,
       bool_and(abs(l.similarity - (
         SELECT sum(a.c * b.c) / sqrt((SELECT sum(c * c) FROM c WHERE item_id = 1) *
                                      (SELECT sum(c * c) FROM c WHERE item_id = l.item_id))
         FROM c a JOIN c b USING (user_id) WHERE a.item_id = 1 AND b.item_id = l.item_id)) < 1e-5)
       AS cosine_by_hand
FROM mth, affinity.items_like(knn_all, 1, 24) l;
-- neighbour lists do not depend on the thread count
SELECT count(*) AS pairs, bool_and(a.item_id = b.item_id AND a.similarity = b.similarity) AS same
FROM mth, generate_series(1, 24) it, affinity.items_like(knn, it, 24) a
JOIN affinity.items_like(knn_2threads, it, 24) b USING (rank);
-- a basket's scores weigh each item's similarities by its weight: the
-- score of item j is sum over basket items i of w_i * sim(i, j), the
-- similarities being those items_like lists (ease: the same with B's rows,
-- checked against numpy in tests/check_ease_numpy.py)
SELECT count(*) AS items,
       max(abs(t.score - (SELECT coalesce(sum(b.w * l.similarity), 0)
                          FROM (VALUES (1::bigint, 2.5::real), (2, 0.5)) b (i, w),
                               affinity.items_like(knn_all, b.i, 24) l
                          WHERE l.item_id = t.item_id))) < 1e-6 AS weighted_sum
FROM mth, affinity.top_items(knn_all, ARRAY[1, 2]::bigint[], 24, weights => ARRAY[2.5, 0.5]::real[]) t;

-- ease reads the pairs as binary (weights do not matter), and a larger
-- regularization shrinks the weights
CREATE TABLE mth_ease AS
SELECT affinity.fit(user_id, item_id, (weight * 5)::real, '{"method": "ease"}') AS reweighted,
       affinity.fit(user_id, item_id, weight, '{"method": "ease", "regularization": 5000}') AS strong
FROM mth_buys;
SELECT bool_and(a.item_id = b.item_id AND abs(a.similarity - b.similarity) < 1e-7) AS same_weights
FROM mth, mth_ease, affinity.items_like(ease, 1, 23) a JOIN affinity.items_like(reweighted, 1, 23) b USING (rank);
SELECT (SELECT max(abs(similarity)) FROM affinity.items_like(strong, 1, 23))
       < (SELECT max(abs(similarity)) FROM affinity.items_like(ease, 1, 23)) AS shrinks
FROM mth, mth_ease;

-- factor functions need factors
SELECT affinity.item_vector(ease, 1) FROM mth;
SELECT * FROM mth, affinity.users_like(knn, 1, 5);

-- this should fail: ease over more items than max_items
SELECT affinity.fit(user_id, item_id, weight, '{"method": "ease", "max_items": 20}') FROM mth_buys;
-- this should fail: an ease model that would not fit in one value (1 GB)
SELECT affinity.fit(g, g, 1, '{"method": "ease", "max_items": 100000}') FROM generate_series(1, 16400) g;
-- this should fail: over affinity.max_fit_memory, before allocating
SET affinity.max_fit_memory = 1;
SELECT affinity.fit(g, g, 1, '{"method": "ease"}') FROM generate_series(1, 600) g;
SELECT affinity.fit(g % 50, g, 1, '{"method": "item_knn", "neighbors": 100000}') FROM generate_series(1, 600) g;
RESET affinity.max_fit_memory;
-- this should fail: without regularization two items bought by the same
-- users would make the Gram matrix singular
SET affinity.regularization = 0;
SELECT affinity.fit(u, i, 1, '{"method": "ease"}')
FROM (VALUES (1::bigint, 1::bigint), (1, 2), (2, 1), (2, 2)) v(u, i);
RESET affinity.regularization;
-- these should fail: bad options
SELECT affinity.fit(user_id, item_id, weight, '{"method": "item_knn", "neighbors": 0}') FROM mth_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"method": "item_knn", "neighbors": "all"}') FROM mth_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"method": "ease", "max_items": 0}') FROM mth_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"method": "ease", "regularization": -5}') FROM mth_buys;
