--
-- The model registry: define, refresh, get, history and revert; a failed
-- refresh keeps the current model; forget_user.
--
\set SHOW_CONTEXT never
CREATE TABLE reg_buys AS
SELECT u::bigint AS customer, (CASE WHEN u <= 30 THEN 0 ELSE 12 END + i)::bigint AS product,
       1::real AS qty
FROM generate_series(1, 60) u, generate_series(1, 12) i
WHERE abs(hashint4(u * 1000 + i)) % 100 < 55;

SELECT affinity.define_model('shop',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys',
  '{"factors": 4, "iterations": 3}');
SELECT name, version, model IS NULL AS empty, options FROM affinity.models;
-- not fitted yet
SELECT affinity.get_model('shop');
SELECT r->'version' AS version, r->'rows' AS rows, r->'users' AS users, r->'items' AS items
FROM affinity.refresh('shop') r;
SELECT count(*) FROM affinity.top_items(affinity.get_model('shop'), 1, 5);
-- three more refreshes: the history keeps the last three (keep_versions)
SELECT (affinity.refresh('shop'))->'version';
INSERT INTO reg_buys VALUES (61, 1, 1), (61, 2, 1);
SELECT (affinity.refresh('shop'))->'version';
SELECT (affinity.refresh('shop'))->'version';
SELECT version FROM affinity.model_history WHERE name = 'shop' ORDER BY version;
SELECT version, (affinity.describe(model)->>'users')::int AS users FROM affinity.models;
-- back to the version before, then to version 2
SELECT r->'version' FROM affinity.revert_model('shop') r;
SELECT version, (affinity.describe(model)->>'users')::int AS users FROM affinity.models;
SELECT r->'version' FROM affinity.revert_model('shop', 2) r;
SELECT affinity.revert_model('shop', 1);
-- a refresh after a revert gets a new version number
SELECT (affinity.refresh('shop'))->'version';
SELECT version FROM affinity.model_history WHERE name = 'shop' ORDER BY version;

-- a failing refresh says why and leaves the current model in place
SELECT version AS before FROM affinity.models WHERE name = 'shop';
UPDATE reg_buys SET qty = -1 WHERE customer = 5 AND product = (SELECT min(product) FROM reg_buys WHERE customer = 5);
SELECT affinity.refresh('shop');
SELECT version AS after, (affinity.describe(model)->>'users')::int AS users FROM affinity.models WHERE name = 'shop';
UPDATE reg_buys SET qty = 1 WHERE qty < 0;

-- whoever writes a model's query becomes its owner, and refresh runs the
-- query with the owner's rights, never with the caller's
CREATE ROLE reg_writer;
GRANT SELECT, UPDATE ON affinity.models TO reg_writer;
SET ROLE reg_writer;
UPDATE affinity.models SET source_query = 'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys WHERE customer < 40'
WHERE name = 'shop';
RESET ROLE;
SELECT owner FROM affinity.models WHERE name = 'shop';
-- the superuser's refresh runs the query as reg_writer, who may not read reg_buys
SELECT affinity.refresh('shop');
GRANT SELECT ON reg_buys TO reg_writer;
GRANT SELECT, INSERT, DELETE ON affinity.model_history TO reg_writer;
SELECT (affinity.refresh('shop'))->'users' AS users;
-- a caller who is not a member of the owner role is refused
CREATE ROLE reg_other;
GRANT SELECT, UPDATE (model, version, fitted_at, stats) ON affinity.models TO reg_other;
SET SESSION AUTHORIZATION reg_other;
SELECT affinity.refresh('shop');
RESET SESSION AUTHORIZATION;
-- put the query back as the superuser (who becomes the owner again)
UPDATE affinity.models SET source_query = 'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys'
WHERE name = 'shop';
SELECT owner = current_user AS owner_back FROM affinity.models WHERE name = 'shop';
REVOKE ALL ON affinity.models FROM reg_writer, reg_other;
REVOKE ALL ON affinity.model_history FROM reg_writer;
REVOKE ALL ON reg_buys FROM reg_writer;
DROP ROLE reg_writer;
DROP ROLE reg_other;

-- bad definitions
SELECT affinity.define_model('bad', 'SELECT 1 AS a', '{}');
SELECT affinity.define_model('bad', 'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys', '[1]');
SELECT affinity.refresh('nothing');
SELECT affinity.get_model('nothing');
-- redefining keeps the name's history and model
SELECT affinity.define_model('shop',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys',
  '{"method": "popularity"}');
SELECT (affinity.refresh('shop'))->>'method' AS method;

-- forget_user: the user's vector and training list are gone, the rest stays
CREATE TABLE reg_m AS
SELECT affinity.fit(customer, product, qty, '{"factors": 4, "iterations": 3, "threads": 1}') AS model FROM reg_buys;
CREATE TABLE reg_f AS SELECT affinity.forget_user(model, 7) AS model FROM reg_m;
SELECT (affinity.describe(f.model)->>'users')::int = (affinity.describe(m.model)->>'users')::int - 1 AS one_user_less,
       (affinity.describe(f.model)->>'interactions')::int
         = (affinity.describe(m.model)->>'interactions')::int - (SELECT count(*) FROM reg_buys WHERE customer = 7)
         AS training_list_gone
FROM reg_m m, reg_f f;
SELECT affinity.user_vector(model, 7) IS NULL AS no_vector FROM reg_f;
SELECT count(*) AS falls_back_to_popular FROM reg_f, affinity.top_items(model, 7, 3, fallback_popular => false);
SELECT bool_and(affinity.user_vector(f.model, u) = affinity.user_vector(m.model, u)) AS others_unchanged
FROM reg_m m, reg_f f, generate_series(1, 61) u WHERE u <> 7;
SELECT affinity.item_vector(f.model, 3) = affinity.item_vector(m.model, 3) AS items_unchanged FROM reg_m m, reg_f f;
-- the copy is a valid value: it survives its text form
SELECT affinity.describe(model::text::affinity.model)->>'users' FROM reg_f;
-- unknown user: unchanged; the only user: error
SELECT affinity.describe(affinity.forget_user(model, -1))->>'checksum' = affinity.describe(model)->>'checksum' AS unchanged FROM reg_m;
SELECT affinity.forget_user(affinity.fit(1::bigint, 2::bigint, 1::real), 1);
