--
-- Serving at scale: baskets (fold-in), the nightly batch, users_like,
-- reasons, and the per-backend model cache.
--
SET extra_float_digits = 0;

CREATE TABLE bat_buys AS
SELECT u::bigint AS user_id,
       (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS item_id,
       (1 + (u * i) % 3)::real AS weight
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

CREATE TABLE bat AS
SELECT affinity.fit(user_id, item_id, weight,
                    '{"factors": 2, "iterations": 10, "threads": 1, "solver": "cholesky"}') AS model
FROM bat_buys;

-- a guest's cart of first-group items leads to first-group items
SELECT array_agg(item_id ORDER BY rank) <@ ARRAY[1,2,3,4,5,6,7,8,9,10,11,12]::bigint[] AS own_group,
       count(*) AS n,
       bool_and(item_id NOT IN (1, 2, 3)) AS basket_excluded
FROM bat, affinity.top_items(model, ARRAY[1, 2, 3]::bigint[], 5);
SELECT array_agg(item_id ORDER BY rank) <@ ARRAY[13,14,15,16,17,18,19,20,21,22,23,24]::bigint[] AS own_group
FROM bat, affinity.top_items(model, ARRAY[20, 21]::bigint[], 4);
-- exclude_seen => false may bring the basket back; weights change the vector
SELECT count(*) FILTER (WHERE item_id IN (1, 2, 3)) > 0 AS basket_back
FROM bat, affinity.top_items(model, ARRAY[1, 2, 3]::bigint[], 24, exclude_seen => false);
SELECT (SELECT array_agg(score ORDER BY item_id) FROM bat, affinity.top_items(model, ARRAY[1, 13]::bigint[], 24, weights => ARRAY[5, 1]::real[]))
    <> (SELECT array_agg(score ORDER BY item_id) FROM bat, affinity.top_items(model, ARRAY[1, 13]::bigint[], 24, weights => ARRAY[1, 5]::real[]))
    AS weights_matter;
-- repeated basket items sum their weights
SELECT (SELECT array_agg(score ORDER BY rank) FROM bat, affinity.top_items(model, ARRAY[1, 1, 2]::bigint[], 5))
     = (SELECT array_agg(score ORDER BY rank) FROM bat, affinity.top_items(model, ARRAY[1, 2]::bigint[], 5, weights => ARRAY[2, 1]::real[]))
    AS summed;
-- fold-in of a known user's history ranks the items the user has not bought
-- (that its scores are those of an exact solve against the item factors is
-- checked with numpy in tests/check_fold_in_numpy.py)
SELECT count(*) AS n FROM bat, affinity.top_items(model, (SELECT array_agg(item_id) FROM bat_buys WHERE user_id = 1), 3);
-- unknown items are ignored; an empty or unknown basket gets the best sellers
SELECT array_agg(item_id ORDER BY rank) FROM bat, affinity.top_items(model, ARRAY[]::bigint[], 3);
SELECT array_agg(item_id ORDER BY rank) FROM bat, affinity.top_items(model, ARRAY[999, NULL]::bigint[], 3);
SELECT array_agg(item_id ORDER BY rank) = (SELECT array_agg(item_id ORDER BY rank) FROM bat, affinity.top_items(model, -1, 3))
       AS same_as_unknown_user, min(source) AS source
FROM bat, affinity.top_items(model, ARRAY[999]::bigint[], 3);
SELECT count(*) FROM bat, affinity.top_items(model, ARRAY[999]::bigint[], 3, fallback_popular => false);
-- a basket of known items: source 'basket'
SELECT source, count(*) FROM bat, affinity.top_items(model, ARRAY[1, 2]::bigint[], 3) GROUP BY 1;
-- the leading arguments are the user form's: model, key, k, exclude_seen,
-- exclude, candidates, fallback_popular; weights come last (by name)
SELECT array_agg(item_id ORDER BY rank) = (SELECT array_agg(item_id ORDER BY rank)
         FROM bat, affinity.top_items(model, ARRAY[1, 2, 3]::bigint[], 5, true, ARRAY[4]::bigint[], NULL, true,
                                      ARRAY[1, 1, 1]::real[])) AS positional
FROM bat, affinity.top_items(model, ARRAY[1, 2, 3]::bigint[], 5, exclude => ARRAY[4]::bigint[]);
-- the order of 1.2 (weights fourth) is refused by type, not taken as exclude_seen
SELECT * FROM bat, affinity.top_items(model, ARRAY[1, 2]::bigint[], 3, ARRAY[1, 2]::real[]);
-- a cart written as an untyped literal is taken as a user key (PostgreSQL
-- resolves an untyped literal to text); the notice and the source column
-- say so, and the cast avoids it
CREATE TABLE bat_txt AS
SELECT affinity.fit('c' || user_id, 'p' || item_id, weight, '{"factors": 2, "iterations": 3, "threads": 1}') AS model
FROM bat_buys;
SELECT min(source) AS source, count(*) FROM bat_txt, affinity.top_items(model, '{p1,p2}', 3);
SELECT min(source) AS source, count(*) FROM bat_txt, affinity.top_items(model, '{p1,p2}'::text[], 3);
-- candidates and exclude
SELECT array_agg(item_id ORDER BY rank) FROM bat,
       affinity.top_items(model, ARRAY[1, 2]::bigint[], 10, candidates => ARRAY[3, 4, 13], exclude => ARRAY[4]);
-- k = 0, NULL basket
SELECT count(*) FROM bat, affinity.top_items(model, ARRAY[1]::bigint[], 0);
SELECT count(*) FROM bat, affinity.top_items(model, NULL::bigint[], 3);
-- bad weights
SELECT * FROM bat, affinity.top_items(model, ARRAY[1, 2]::bigint[], 3, weights => ARRAY[1]::real[]);
SELECT * FROM bat, affinity.top_items(model, ARRAY[1, 2]::bigint[], 3, weights => ARRAY[1, -1]::real[]);
SELECT * FROM bat, affinity.top_items(model, ARRAY[1, 2]::bigint[], 3, weights => ARRAY[1, 'NaN']::real[]);

-- the nightly batch equals top_items per user (same items and ranks;
-- scores agree to float rounding), at a size where the batch really runs in
-- parallel: 1500 users are 24 blocks of 64 users, shared by 2 threads
-- (affinity.max_threads is raised so that 2 run even on a one-CPU machine;
-- runtime() shows the count the batch uses, which blocks each thread took is
-- not visible from SQL).  The batch scores a block with one sgemm, top_items
-- one user with sgemv: the largest score difference measured is 1.8e-7
-- (scores up to 1.06), the tolerance 1e-5.  Where the items at a rank differ,
-- the two are a tie within that tolerance (score() of the batch's item equals
-- top_items' score), so that a float-rounding swap is not a mismatch.
CREATE TABLE bat_wide_buys AS
SELECT u::bigint AS user_id, i::bigint AS item_id, (1 + (u + i) % 4)::real AS weight
FROM generate_series(1, 1500) u, generate_series(1, 200) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 6;
CREATE TABLE bat_wide AS
SELECT affinity.fit(user_id, item_id, weight,
                    '{"factors": 8, "iterations": 4, "threads": 1, "solver": "cholesky"}') AS model
FROM bat_wide_buys;
SET affinity.max_threads = 2;
SET affinity.threads = 2;
SELECT affinity.runtime()->'fit_threads' AS batch_threads,
       ((affinity.describe(model)->>'users')::int + 63) / 64 AS blocks_of_64
FROM bat_wide;
CREATE TABLE bat_all AS SELECT t.* FROM bat_wide, affinity.top_items_for_all(model, 5) t;
RESET affinity.threads;
RESET affinity.max_threads;
CREATE TABLE bat_each AS
SELECT u AS user_id, t.* FROM bat_wide, generate_series(1, 1500) u, affinity.top_items(model, u, 5) t;
SELECT count(*) AS rows, count(DISTINCT user_id) AS users FROM bat_all;
SELECT count(*) AS mismatches
FROM bat_wide, bat_all a FULL JOIN bat_each e USING (user_id, rank)
WHERE abs(a.score - e.score) > 1e-5 IS NOT FALSE
   OR (a.item_id <> e.item_id
       AND abs(affinity.score(model, a.user_id, a.item_id) - e.score) > 1e-5);
-- the same with exclude and candidates (what is on promotion, what is in
-- stock), 2 threads again: the batch's rows equal top_items' with the same
-- filters, user by user
SET affinity.threads = 2;
CREATE TABLE bat_filter AS
SELECT ARRAY[1, 2, 3, 50, 51]::bigint[] AS exclude,
       (SELECT array_agg(i::bigint) FROM generate_series(1, 200, 3) i) AS candidates;
CREATE TABLE bat_all_f AS
SELECT t.* FROM bat_wide, bat_filter f,
       affinity.top_items_for_all(model, 5, exclude => f.exclude, candidates => f.candidates) t;
RESET affinity.threads;
CREATE TABLE bat_each_f AS
SELECT u AS user_id, t.* FROM bat_wide, bat_filter f, generate_series(1, 1500) u,
       affinity.top_items(model, u, 5, exclude => f.exclude, candidates => f.candidates) t;
SELECT count(*) AS rows, count(DISTINCT user_id) AS users,
       bool_and(item_id % 3 = 1 AND item_id NOT IN (1, 50)) AS filtered,
       bool_and(source = 'personal') AS personal
FROM bat_all_f;
SELECT count(*) AS mismatches
FROM bat_wide, bat_all_f a FULL JOIN bat_each_f e USING (user_id, rank)
WHERE abs(a.score - e.score) > 1e-5 IS NOT FALSE OR a.source IS DISTINCT FROM e.source
   OR (a.item_id <> e.item_id
       AND abs(affinity.score(model, a.user_id, a.item_id) - e.score) > 1e-5);
-- rules in the batch: the same rows as top_items with the same rules, user
-- by user (2 threads)
CREATE TABLE bat_rules AS
SELECT jsonb_build_object('max_per_group', 2, 'diversity', 0.4,
                          'groups', (SELECT jsonb_object_agg(i::text, 'g' || (i % 7)) FROM generate_series(1, 200) i)) AS rules;
SET affinity.threads = 2;
CREATE TABLE bat_all_r AS
SELECT t.* FROM bat_wide, bat_rules r, affinity.top_items_for_all(model, 5, rules => r.rules) t;
RESET affinity.threads;
CREATE TABLE bat_each_r AS
SELECT u AS user_id, t.* FROM bat_wide, bat_rules r, generate_series(1, 1500) u,
       affinity.top_items(model, u, 5, rules => r.rules) t;
SELECT count(*) AS rows, count(DISTINCT user_id) AS users,
       (SELECT max(n) FROM (SELECT count(*) AS n FROM bat_all_r GROUP BY user_id, item_id % 7) g) AS most_per_group
FROM bat_all_r;
SELECT count(*) AS mismatches
FROM bat_all_r a FULL JOIN bat_each_r e USING (user_id, rank)
WHERE a.item_id IS DISTINCT FROM e.item_id OR abs(a.score - e.score) > 1e-5 IS NOT FALSE;
-- a list of users, exclude_seen => false, k above the catalogue; an unknown
-- user (999) gets the popular items, as top_items gives it, unless
-- fallback_popular is false
SELECT user_id, count(*), min(source) AS source FROM bat, affinity.top_items_for_all(model, 3, users => ARRAY[5, 40, 999, 999, NULL]) GROUP BY 1 ORDER BY 1;
SELECT (SELECT array_agg(item_id || ':' || rank || ':' || source ORDER BY rank)
        FROM bat, affinity.top_items_for_all(model, 4, users => ARRAY[999], exclude => ARRAY[1],
                                             candidates => ARRAY[1, 2, 3, 4, 13, 14]) t)
     = (SELECT array_agg(item_id || ':' || rank || ':' || source ORDER BY rank)
        FROM bat, affinity.top_items(model, 999, 4, exclude => ARRAY[1],
                                     candidates => ARRAY[1, 2, 3, 4, 13, 14]) t) AS same_as_top_items;
SELECT user_id, count(*) FROM bat, affinity.top_items_for_all(model, 3, users => ARRAY[5, 999], fallback_popular => false) GROUP BY 1 ORDER BY 1;
SELECT * FROM bat, affinity.top_items_for_all(model, 3, fallback_popular => NULL);
SELECT count(*) FILTER (WHERE EXISTS (SELECT 1 FROM bat_buys b WHERE b.user_id = t.user_id AND b.item_id = t.item_id)) > 0
       AS seen_included
FROM bat, affinity.top_items_for_all(model, 3, exclude_seen => false) t;
SELECT count(*) = (SELECT 60 * 24 - count(*) FROM bat_buys) AS every_unseen_pair
FROM bat, affinity.top_items_for_all(model, 1000000) t;
SELECT count(*) FROM bat, affinity.top_items_for_all(model, 0);
SELECT count(*) FROM bat, affinity.top_items_for_all(model, 3, users => ARRAY[]::bigint[]);
SELECT * FROM bat, affinity.top_items_for_all(model, -2);

-- users like user 1 are first-group users
SELECT bool_and(user_id BETWEEN 2 AND 30) AS own_group, count(*) AS n
FROM bat, affinity.users_like(model, 1, 5);
SELECT count(*) FROM bat, affinity.users_like(model, 12345, 5);
SELECT count(*) FROM bat, affinity.users_like(model, 1, 1000);

-- reasons: the user's training items, ranked by contribution
SELECT count(*) AS n,
       bool_and(EXISTS (SELECT 1 FROM bat_buys b WHERE b.user_id = 1 AND b.item_id = r.past_item_id)) AS training_items
FROM bat, affinity.reasons(model, 1, 5, 100) r;
SELECT bool_and(a.contribution >= b.contribution) AS ordered
FROM bat, affinity.reasons(model, 1, 5, 100) a, affinity.reasons(model, 1, 5, 100) b
WHERE b.rank = a.rank + 1;
SELECT count(*) FROM bat, affinity.reasons(model, 1, 5, 2);
SELECT count(*) FROM bat, affinity.reasons(model, -1, 5);
SELECT count(*) FROM bat, affinity.reasons(model, 1, -5);

-- the cache: a LATERAL over many users loads a stored model once, and a
-- later query in the same backend loads it no more.  This model is large
-- enough to be stored out of line (TOAST).
CREATE TABLE bat_big AS
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 32, "iterations": 2}') AS model
FROM bat_buys;
SELECT pg_relation_size(reltoastrelid) > 0 AS stored_out_of_line
FROM pg_class WHERE oid = 'bat_big'::regclass;
CREATE TABLE bat_cache AS SELECT (affinity.runtime()->'model_cache'->>'loads')::int AS loads0;
SELECT count(*) FROM bat_big, generate_series(1, 10000) u, affinity.top_items(model, u % 60 + 1, 3);
SELECT (affinity.runtime()->'model_cache'->>'loads')::int - loads0 AS loads_for_10000_calls FROM bat_cache;
SELECT count(*) FROM bat_big, generate_series(1, 10000) u, affinity.top_items(model, u % 60 + 1, 3);
SELECT (affinity.runtime()->'model_cache'->>'loads')::int - loads0 AS loads_after_second_query FROM bat_cache;
-- describe reads only the header and the per-sweep arrays
SELECT (affinity.describe(model)->>'users')::int AS users FROM bat_big;
SELECT (affinity.runtime()->'model_cache'->>'loads')::int - loads0 AS loads_after_describe FROM bat_cache;
-- a changed model is a new value: it is loaded, never mistaken for the old one
UPDATE bat_big SET model = (SELECT affinity.fit(user_id, item_id, weight, '{"factors": 32, "iterations": 3}') FROM bat_buys);
SELECT count(*) FROM bat_big, generate_series(1, 100) u, affinity.top_items(model, u % 60 + 1, 3);
SELECT (affinity.runtime()->'model_cache'->>'loads')::int - loads0 AS loads_after_update FROM bat_cache;
SELECT jsonb_array_length(affinity.describe(model)->'loss') AS sweeps_of_new_model FROM bat_big;
-- a cache of size 0 keeps only the model in use
SET affinity.model_cache_size = 0;
SELECT count(*) FROM bat, generate_series(1, 100) u, affinity.top_items(model, u % 60 + 1, 3);
SELECT count(*) FROM bat_big, generate_series(1, 100) u, affinity.top_items(model, u % 60 + 1, 3);
SELECT (affinity.runtime()->'model_cache'->>'entries')::int AS entries;
RESET affinity.model_cache_size;

-- popularity models in the batch
CREATE TABLE bat_pop AS
SELECT affinity.fit(user_id, item_id, weight, '{"method": "popularity"}') AS model FROM bat_buys;
SELECT count(*) AS rows, count(DISTINCT user_id) AS users FROM bat_pop, affinity.top_items_for_all(model, 2);
SELECT * FROM bat_pop, affinity.users_like(model, 1);
SELECT * FROM bat_pop, affinity.reasons(model, 1, 2);
