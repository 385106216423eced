--
-- Bad input: each error says what is wrong, names the value, and loses
-- nothing.
--
CREATE TABLE err_buys AS
SELECT u AS user_id, i AS item_id, 1::real AS weight
FROM generate_series(1, 10) u, generate_series(1, 6) i;
CREATE TABLE err_model AS
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 2, "iterations": 2}') AS model FROM err_buys;

-- weights
SELECT affinity.fit(u, i, w) FROM (VALUES (1::bigint, 2::bigint, -1::real)) v(u, i, w);
SELECT affinity.fit(u, i, w) FROM (VALUES (3::bigint, 4::bigint, 'NaN'::real)) v(u, i, w);
SELECT affinity.fit(u, i, w) FROM (VALUES (5::bigint, 6::bigint, 'Infinity'::real)) v(u, i, w);
SELECT affinity.fit(u, i, w) FROM (VALUES (1::bigint, 1::bigint, 3e38::real), (1, 1, 3e38)) v(u, i, w);

-- empty and unusable input
SELECT affinity.fit(user_id, item_id, weight) FROM err_buys WHERE false;
SELECT affinity.fit(u, i, w) FROM (VALUES (1::bigint, 2::bigint, 0::real), (NULL, 3, 1)) v(u, i, w);
SELECT affinity.fit(user_id, item_id, weight, '{"min_user_interactions": 100}') FROM err_buys;

-- options
SELECT affinity.fit(user_id, item_id, weight, '{"factor": 8}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 0}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 2.5}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"factors": "many"}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"iterations": -1}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"regularization": 0}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"alpha": -2}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"solver": "qr"}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"confidence": "square"}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"method": "magic"}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"method": "ease", "max_items": 3}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"verbose": "yes"}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"seed": {"a": 1}}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '[1, 2]') FROM err_buys;
SET affinity.factors = 0;
SET affinity.no_such_setting = 1;

-- memory guard
SET affinity.max_fit_memory = 1;
SELECT affinity.fit(u, i, 1) FROM generate_series(1, 300) u, generate_series(1, 100) i;
RESET affinity.max_fit_memory;

-- serving arguments
SELECT * FROM err_model, affinity.top_items(model, 1, -1);
SELECT * FROM err_model, affinity.top_items(model, 1, NULL);
SELECT * FROM err_model, affinity.top_items(model, 1, 5, exclude_seen => NULL);
SELECT * FROM err_model, affinity.items_like(model, 1, -3);

-- the table is intact after all of that
SELECT count(*) FROM err_buys;
SELECT affinity.describe(model)->'users' FROM err_model;

-- option bounds: every number option has an upper bound, and a number
-- beyond double precision is refused naming the option
SELECT affinity.fit(user_id, item_id, weight, '{"alpha": 1e400}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"alpha": 1e300}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"regularization": 1e300}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"epsilon": 1e-9}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"solver_steps": 1001}') FROM err_buys;
SELECT affinity.fit(user_id, item_id, weight, '{"threads": 1025}') FROM err_buys;
-- the old name of solver_steps still works, with a notice
SELECT (affinity.describe(affinity.fit(user_id, item_id, weight,
          '{"cg_steps": 2, "factors": 2, "iterations": 1}'))->'options'->'solver_steps') AS solver_steps
FROM err_buys;
-- a fit at the bounds succeeds and gives finite factors
SELECT d->'options'->'alpha' AS alpha, d->'options'->'regularization' AS regularization,
       d->'options'->'epsilon' AS epsilon,
       bool_and(x = x AND abs(x) < 'Infinity') AS finite
FROM (SELECT affinity.fit(user_id, item_id, weight,
        '{"alpha": 1e6, "regularization": 1e8, "epsilon": 1e-6, "factors": 2, "iterations": 2}') AS m
      FROM err_buys) f, affinity.describe(m) d, affinity.user_vectors(m) uv, unnest(uv.vector) x
GROUP BY 1, 2, 3;
SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
          '{"method": "item_knn", "alpha": 1e6, "epsilon": 1e-6, "confidence": "linear"}'))->'items' AS items
FROM err_buys;
-- a confidence beyond 1e12 (linear, one weight of 1e30) is refused, naming
-- the interaction, for implicit_als and item_knn alike
SELECT affinity.fit(u, i, w, '{"confidence": "linear", "factors": 2}')
FROM (VALUES (1::bigint, 1::bigint, 1::real), (2, 1, 1e30), (2, 2, 1)) v(u, i, w);
SELECT affinity.fit(u, i, w, '{"method": "item_knn", "confidence": "linear"}')
FROM (VALUES (1::bigint, 1::bigint, 1::real), (2, 1, 1e30), (2, 2, 1)) v(u, i, w);
-- the log confidence of the same weight is usable
SELECT affinity.describe(affinity.fit(u, i, w, '{"factors": 2, "iterations": 2}'))->'users' AS users
FROM (VALUES (1::bigint, 1::bigint, 1::real), (2, 1, 1e30), (2, 2, 1)) v(u, i, w);
-- a setting beyond an option's bound is refused like the option
SET affinity.alpha = 1e9;
SELECT affinity.fit(user_id, item_id, weight) FROM err_buys;
RESET affinity.alpha;
-- basket weights whose sum is beyond the range of real are refused, naming
-- the item (3e38 + 3e38 was an infinite weight, its scores NaN, ranked in
-- an arbitrary order); one weight of 3e38 is a real and is served
SELECT t.* FROM err_model, affinity.top_items(model, ARRAY[2, 2]::bigint[], 3,
       weights => ARRAY[3e38, 3e38]::real[]) t;
SELECT count(*) FROM err_model, affinity.top_items(model, ARRAY[2]::bigint[], 3,
       weights => ARRAY[3e38]::real[]) t;
-- a score row that comes out non-finite is refused, not ranked: linear
-- confidence with alpha 1e6 turns a basket weight of 1e33 into a confidence
-- beyond the range of real
CREATE TABLE err_linear AS
SELECT affinity.fit(user_id, item_id, weight,
       '{"factors": 2, "iterations": 2, "confidence": "linear", "alpha": 1e6}') AS model
FROM err_buys;
SELECT t.* FROM err_linear, affinity.top_items(model, ARRAY[2, 3]::bigint[], 3,
       weights => ARRAY[1e33, 1]::real[]) t;
SELECT count(*) FROM err_linear, affinity.top_items(model, ARRAY[2, 3]::bigint[], 3,
       weights => ARRAY[1e5, 1]::real[]) t;
DROP TABLE err_linear;
