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

-- Whoever writes a model's query owns it: the query is checked and refreshed
-- only in sessions logged in as its owner, and only the owner changes the
-- model (the attacks are in privileges.sql).  Roles that log in: the
-- throwaway cluster trusts its socket.
SELECT current_user AS superuser \gset
CREATE ROLE regress_reg_operator SUPERUSER LOGIN;
CREATE ROLE regress_reg_writer LOGIN;
GRANT SELECT, INSERT, UPDATE, DELETE ON affinity.models TO regress_reg_writer;
GRANT SELECT, INSERT, DELETE ON affinity.model_history TO regress_reg_writer;
GRANT SELECT ON reg_buys TO regress_reg_writer;
\c - regress_reg_writer
-- a model of its own it defines, refreshes and reverts
SELECT affinity.define_model('shop_writer',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys WHERE customer < 40',
  '{"factors": 4, "iterations": 3, "threads": 1}');
SELECT owner, owner_name, owner::oid = (SELECT oid FROM pg_roles WHERE rolname = current_user) AS owner_oid
FROM affinity.models WHERE name = 'shop_writer';
SELECT (affinity.refresh('shop_writer'))->'users' AS users;
SELECT (affinity.refresh('shop_writer'))->'version' AS version;
SELECT r->'version' AS version FROM affinity.revert_model('shop_writer') r;
UPDATE affinity.models SET keep_versions = 2 WHERE name = 'shop_writer';
\c - regress_reg_operator
-- a superuser may not refresh or revert it: the query runs only in the
-- writer's own sessions
SELECT affinity.refresh('shop_writer');
SELECT affinity.revert_model('shop_writer');
-- but may change it, as PostgreSQL lets a superuser change any row: options
-- leave the owner in place, writing the query makes the superuser its owner
UPDATE affinity.models SET options = '{"factors": 2, "iterations": 2, "threads": 1}' WHERE name = 'shop_writer';
SELECT owner FROM affinity.models WHERE name = 'shop_writer';
UPDATE affinity.models SET source_query = 'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_buys WHERE customer < 20'
WHERE name = 'shop_writer';
SELECT owner::text = current_user AS superuser_owns_it, owner_name = current_user AS name_too
FROM affinity.models WHERE name = 'shop_writer';
SELECT (affinity.refresh('shop_writer'))->'users' AS users;
DELETE FROM affinity.models WHERE name = 'shop_writer';
SELECT count(*) AS history_left FROM affinity.model_history WHERE name = 'shop_writer';
\c - :superuser
REVOKE ALL ON affinity.models, affinity.model_history, reg_buys FROM regress_reg_writer;
DROP ROLE regress_reg_writer;
DROP ROLE regress_reg_operator;

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

-- Key types come from the query's own columns: text stock codes make a
-- text-key model, checked at define time and kept across refreshes.
\set SHOW_CONTEXT never
CREATE TABLE reg_codes AS
SELECT 'C-' || customer AS customer_ref, 'SKU-' || product AS sku, qty, customer, product,
       customer::int AS customer_int, customer::numeric AS customer_num
FROM reg_buys;
SELECT affinity.define_model('codes',
  'SELECT customer_ref AS user_id, sku AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT key_types, keep_versions FROM affinity.models WHERE name = 'codes';
SELECT r->'version' AS version, r->>'key_types' AS key_types FROM affinity.refresh('codes') r;
SELECT affinity.describe(affinity.get_model('codes'))->>'key_type' AS model_keys;
SELECT item_id, pg_typeof(item_id) FROM affinity.top_items(affinity.get_model('codes'), 'C-1', 2);
-- codes that all look like numbers still make text keys (the column is text)
SELECT affinity.define_model('numeric_looking',
  'SELECT customer::text AS user_id, product::text AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT (affinity.refresh('numeric_looking'))->>'key_types' AS key_types;
SELECT count(*) FROM affinity.top_items(affinity.get_model('numeric_looking'), '1', 3);
SELECT count(*) FROM affinity.top_items(affinity.get_model('numeric_looking'), 1::bigint, 3);
-- integer and smallint columns are bigint keys; varchar is text
SELECT affinity.define_model('ints',
  'SELECT customer_int AS user_id, product::smallint AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT affinity.define_model('varchars',
  'SELECT customer_ref::varchar(10) AS user_id, sku::varchar AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT name, key_types FROM affinity.models WHERE name IN ('ints', 'varchars') ORDER BY name;
SELECT (affinity.refresh('ints'))->>'key_types' AS ints, (affinity.refresh('varchars'))->>'key_types' AS varchars;
-- domains count as their base type
CREATE DOMAIN reg_sku AS text CHECK (VALUE LIKE 'SKU-%');
SELECT affinity.define_model('domains',
  'SELECT customer_ref AS user_id, sku::reg_sku AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT key_types FROM affinity.models WHERE name = 'domains';
-- ids that are not keys: numeric, float8, other types; the hint names the cast
SELECT affinity.define_model('numeric_ids',
  'SELECT customer_num AS user_id, product AS item_id, qty AS weight FROM reg_codes');
SELECT affinity.define_model('float_ids',
  'SELECT customer AS user_id, product::float8 AS item_id, qty AS weight FROM reg_codes');
SELECT affinity.define_model('date_ids',
  'SELECT current_date AS user_id, product AS item_id, qty AS weight FROM reg_codes');
SELECT count(*) AS refused_models_absent FROM affinity.models
WHERE name IN ('numeric_ids', 'float_ids', 'date_ids');
-- mixed pairs are models of their own key types (bigint users with text
-- items, text users with bigint items); a model never fitted may change them
SELECT affinity.define_model('mixed',
  'SELECT customer AS user_id, sku AS item_id, qty AS weight FROM reg_codes');
SELECT key_types FROM affinity.models WHERE name = 'mixed';
SELECT affinity.define_model('mixed',
  'SELECT customer_ref AS user_id, product AS item_id, qty AS weight FROM reg_codes');
SELECT r->'key_types' AS key_types FROM affinity.refresh('mixed') r;
SELECT affinity.model_key_types(affinity.get_model('mixed')) AS model_keys;
DELETE FROM affinity.models WHERE name = 'mixed';
-- a refresh whose query now yields other key types is refused; the current
-- model stays
SELECT version AS before, affinity.describe(model)->>'checksum' AS checksum FROM affinity.models WHERE name = 'codes' \gset
UPDATE affinity.models
SET source_query = 'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_codes'
WHERE name = 'codes';
SELECT affinity.refresh('codes');
SELECT version = :before AS same_version, affinity.describe(model)->>'checksum' = :'checksum' AS same_model, key_types
FROM affinity.models WHERE name = 'codes';
-- also when a column's type changes under the query
UPDATE affinity.models
SET source_query = 'SELECT customer_ref AS user_id, sku AS item_id, qty AS weight FROM reg_codes'
WHERE name = 'codes';
ALTER TABLE reg_codes ALTER COLUMN sku TYPE bigint USING substr(sku, 5)::bigint;
SELECT affinity.refresh('codes');
ALTER TABLE reg_codes ALTER COLUMN sku TYPE text USING 'SKU-' || sku;
SELECT (affinity.refresh('codes'))->'version' AS version;
-- redefinition may change the key types (a notice says so); a kept version
-- of the old types is not reverted to
SELECT affinity.define_model('codes',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT key_types FROM affinity.models WHERE name = 'codes';
SELECT (affinity.refresh('codes'))->'version' AS version;
SELECT count(*) FROM affinity.top_items(affinity.get_model('codes'), 1::bigint, 3);
SELECT affinity.revert_model('codes');
SELECT version, key_types, affinity.describe(model)->>'key_type' AS model_keys
FROM affinity.models WHERE name = 'codes';
-- a row inserted without define_model gets its key types at the first refresh
INSERT INTO affinity.models (name, source_query, options)
VALUES ('inserted', 'SELECT customer_ref AS user_id, sku AS item_id, qty AS weight FROM public.reg_codes', '{"method": "popularity"}');
SELECT key_types IS NULL AS not_known_yet FROM affinity.models WHERE name = 'inserted';
SELECT (affinity.refresh('inserted'))->>'key_types' AS key_types;
SELECT key_types FROM affinity.models WHERE name = 'inserted';
-- key_types holds a pair of type names and nothing else
\set VERBOSITY terse
UPDATE affinity.models SET key_types = 'text, weight::real, $1) FROM pg_class --' WHERE name = 'inserted';
\set VERBOSITY default

-- keep_versions through define_model: given, kept on redefinition, trimmed
-- at once when lowered, refused below 1
SELECT affinity.define_model('kept',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}', keep_versions => 5);
SELECT (affinity.refresh('kept'))->'version', (affinity.refresh('kept'))->'version',
       (affinity.refresh('kept'))->'version', (affinity.refresh('kept'))->'version';
SELECT keep_versions, (SELECT count(*) FROM affinity.model_history h WHERE h.name = 'kept') AS kept
FROM affinity.models WHERE name = 'kept';
SELECT affinity.define_model('kept',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}');
SELECT keep_versions FROM affinity.models WHERE name = 'kept';
SELECT affinity.define_model('kept',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}', keep_versions => 2);
SELECT keep_versions, array_agg(h.version ORDER BY h.version) AS versions
FROM affinity.models m JOIN affinity.model_history h USING (name) WHERE name = 'kept' GROUP BY 1;
SELECT affinity.define_model('kept',
  'SELECT customer AS user_id, product AS item_id, qty AS weight FROM reg_codes',
  '{"method": "popularity"}', keep_versions => 0);
SELECT keep_versions FROM affinity.models WHERE name = 'kept';
DELETE FROM affinity.models WHERE name IN ('codes', 'numeric_looking', 'ints', 'varchars', 'domains', 'inserted', 'kept');
DROP TABLE reg_codes;
DROP DOMAIN reg_sku;
