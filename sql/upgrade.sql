--
-- Upgrades: a model stored under version 1.0 serves unchanged after
-- ALTER EXTENSION affinity UPDATE to 1.1 and then to 1.2; the 1.1 registry's
-- owners (role names) become role oids, and a model whose owner role no
-- longer exists cannot be refreshed; C functions that name the older
-- library's symbols fail until the update to 1.2 binds them to the new ones;
-- a 1.2 database keeps its results under the 1.3 library until the update
-- to 1.3, which makes top_items and the batch again with their grants.
--
SET client_min_messages = warning;
DROP EXTENSION affinity CASCADE;
RESET client_min_messages;
CREATE EXTENSION affinity VERSION '1.0';
SELECT extversion FROM pg_extension WHERE extname = 'affinity';
SELECT to_regclass('affinity.models') IS NULL AS no_registry_in_1_0;
CREATE TABLE upg_buys AS
SELECT u::bigint AS user_id, (abs(hashint4(u * 13 + i)) % 40)::bigint AS item_id, 1::real AS weight
FROM generate_series(1, 100) u, generate_series(1, 6) i;
CREATE TABLE upg_model AS
SELECT affinity.fit(user_id, item_id, weight, '{"factors": 4, "iterations": 3}') AS model FROM upg_buys;
CREATE TABLE upg_before AS
SELECT u AS user_id, t.* FROM upg_model, generate_series(1, 100) u, affinity.top_items(model, u, 5) t;
CREATE TABLE upg_checksum AS SELECT affinity.describe(model)->>'checksum' AS c FROM upg_model;
ALTER EXTENSION affinity UPDATE TO '1.1';
SELECT extversion FROM pg_extension WHERE extname = 'affinity';
SELECT to_regclass('affinity.models') IS NOT NULL AS registry_in_1_1;
SELECT affinity.describe(model)->>'checksum' = c AS same_value FROM upg_model, upg_checksum;
SELECT count(*) AS differences FROM (
  SELECT u AS user_id, t.* FROM upg_model, generate_series(1, 100) u, affinity.top_items(model, u, 5) t
  EXCEPT SELECT * FROM upg_before) d;
-- and the stored model can enter the registry's world
SELECT affinity.define_model('upgraded', 'SELECT user_id, item_id, weight FROM upg_buys');
SELECT (affinity.refresh('upgraded'))->'version';
-- a 1.1 model of a role that is dropped before the update
CREATE ROLE regress_upg_gone;
GRANT SELECT, INSERT, UPDATE ON affinity.models TO regress_upg_gone;
GRANT SELECT ON upg_buys TO regress_upg_gone;
SET ROLE regress_upg_gone;
SELECT affinity.define_model('orphaned', 'SELECT user_id, item_id, weight FROM public.upg_buys');
RESET ROLE;
REVOKE ALL ON affinity.models, upg_buys FROM regress_upg_gone;
DROP ROLE regress_upg_gone;
SELECT name, owner = current_user AS mine FROM affinity.models ORDER BY name;

-- A database created by a library before 1.2 names the old symbols, most
-- without the affinity_ prefix (top_items, score, describe, model_in, ...):
-- this one's C functions are set back to those names, as such a database has
-- them.  With the 1.2 library installed, their calls fail until the update.
UPDATE pg_proc SET prosrc = substr(prosrc, length('affinity_') + 1)
WHERE oid IN (SELECT objid FROM pg_depend d JOIN pg_extension e ON e.oid = d.refobjid
              WHERE d.classid = 'pg_proc'::regclass AND d.deptype = 'e' AND e.extname = 'affinity')
  AND prolang = (SELECT oid FROM pg_language WHERE lanname = 'c')
  AND prosrc LIKE 'affinity\_%' AND prosrc NOT LIKE 'affinity\_fit\_%' AND prosrc <> 'affinity_runtime';
SELECT count(*) AS functions_with_old_symbols, count(DISTINCT prosrc) AS old_symbols
FROM pg_proc WHERE probin = '$libdir/affinity' AND prosrc NOT LIKE 'affinity\_%';
-- the library's path is left out of the message, it differs between installations
CREATE FUNCTION pg_temp.call_fails(q text) RETURNS text LANGUAGE plpgsql AS $$
BEGIN
	EXECUTE q;
	RETURN 'no error';
EXCEPTION WHEN undefined_function THEN
	RETURN regexp_replace(SQLERRM, 'in file ".*"', 'in the installed library');
END
$$;
SELECT pg_temp.call_fails('SELECT affinity.describe(model) FROM upg_model');
SELECT pg_temp.call_fails('SELECT count(*) FROM upg_model, affinity.top_items(model, 1, 5)');
ALTER EXTENSION affinity UPDATE TO '1.2';
SELECT pg_temp.call_fails('SELECT affinity.describe(model) FROM upg_model');
-- every C function of the extension is bound to its 1.2 symbol
SELECT count(*) AS functions_with_old_symbols
FROM pg_proc WHERE probin = '$libdir/affinity' AND prosrc NOT LIKE 'affinity\_%';
-- and the key types of the registry's models were read from their values
SELECT name, key_types FROM affinity.models ORDER BY name;
SELECT extversion FROM pg_extension WHERE extname = 'affinity';
SELECT affinity.describe(model)->>'checksum' = c AS same_value FROM upg_model, upg_checksum;
-- owners are role oids now, with the name they had
SELECT name, owner::oid = (SELECT oid FROM pg_roles WHERE rolname = current_user) AS owned_by_me,
       owner::oid = 0 AS no_owner, owner_name = current_user AS my_name, pg_typeof(owner)
FROM affinity.models ORDER BY name;
SELECT owner_name FROM affinity.models WHERE name = 'orphaned';
SELECT (affinity.refresh('upgraded'))->'version';
SELECT version, (SELECT count(*) FROM affinity.model_history h WHERE h.name = m.name) AS kept
FROM affinity.models m WHERE name = 'upgraded';
\set SHOW_CONTEXT never
SELECT affinity.refresh('orphaned');
\set SHOW_CONTEXT errors
-- the aggregates were made again: members of the extension, with comments
-- and with what their final functions do
SELECT a.aggfnoid::regprocedure AS aggregate, a.aggfinalmodify,
       obj_description(a.aggfnoid, 'pg_proc') IS NOT NULL AS commented,
       EXISTS (SELECT FROM pg_depend d JOIN pg_extension e ON e.oid = d.refobjid
               WHERE d.classid = 'pg_proc'::regclass AND d.objid = a.aggfnoid
                 AND d.deptype = 'e' AND e.extname = 'affinity') AS member
FROM pg_aggregate a JOIN pg_proc p ON p.oid = a.aggfnoid
WHERE p.pronamespace = 'affinity'::regnamespace
ORDER BY a.aggfnoid::regprocedure::text;
-- and the model stored under 1.0 still serves the same
SELECT count(*) AS differences FROM (
  SELECT u AS user_id, t.* FROM upg_model, generate_series(1, 100) u, affinity.top_items(model, u, 5) t
  EXCEPT SELECT * FROM upg_before) d;
DELETE FROM affinity.models WHERE name = 'orphaned';
-- A 1.2 database served by the 1.3 library keeps the 1.2 arguments (the
-- basket's weights fourth, the batch without filters and leaving unknown
-- users out) and results (no source column).
CREATE TABLE upg_12 AS
SELECT 'basket' AS call, array_agg(item_id ORDER BY rank) AS items
FROM upg_model, affinity.top_items(model, ARRAY[1, 2]::bigint[], 5, ARRAY[2, 1]::real[])
UNION ALL
SELECT 'batch', array_agg(item_id ORDER BY user_id, rank)
FROM upg_model, affinity.top_items_for_all(model, 3, true, ARRAY[1, 2, 99999]::bigint[]);
SELECT call, cardinality(items) FROM upg_12 ORDER BY call;
CREATE TABLE upg_12_row AS SELECT t.* FROM upg_model, affinity.top_items(model, 1, 1) t;
SELECT string_agg(attname, ', ' ORDER BY attnum) AS columns_in_1_2
FROM pg_attribute WHERE attrelid = 'upg_12_row'::regclass AND attnum > 0;
-- grants on the functions that 1.3 makes again are carried over
CREATE ROLE regress_upg_reader;
REVOKE EXECUTE ON FUNCTION affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean) FROM PUBLIC;
GRANT EXECUTE ON FUNCTION affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean) TO regress_upg_reader;
-- and on to 1.3
ALTER EXTENSION affinity UPDATE TO '1.3';
SELECT extversion FROM pg_extension WHERE extname = 'affinity';
SELECT has_function_privilege('public', 'affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean, jsonb)', 'EXECUTE') AS public_may,
       has_function_privilege('regress_upg_reader', 'affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean, jsonb)', 'EXECUTE') AS reader_may,
       has_function_privilege('public', 'affinity.top_items(affinity.model, text, integer, boolean, text[], text[], boolean, jsonb)', 'EXECUTE') AS public_may_text_form;
-- and a dump keeps them: no grant is recorded as the extension's own
-- (pg_dump leaves initial privileges out), as in a fresh install
SELECT count(*) AS initial_privileges_recorded FROM pg_init_privs
WHERE classoid = 'pg_proc'::regclass
  AND objoid IN (SELECT oid FROM pg_proc WHERE pronamespace = 'affinity'::regnamespace
                 AND proname IN ('top_items', 'top_items_for_all'));
-- the same answers through the 1.3 forms
SELECT (SELECT array_agg(item_id ORDER BY rank)
        FROM upg_model, affinity.top_items(model, ARRAY[1, 2]::bigint[], 5, weights => ARRAY[2, 1]::real[])) = items AS same_basket
FROM upg_12 WHERE call = 'basket';
SELECT (SELECT array_agg(item_id ORDER BY user_id, rank)
        FROM upg_model, affinity.top_items_for_all(model, 3, true, ARRAY[1, 2, 99999]::bigint[], fallback_popular => false)) = items AS same_batch
FROM upg_12 WHERE call = 'batch';
SELECT count(*) AS differences FROM (
  SELECT u AS user_id, t.item_id, t.score, t.rank FROM upg_model, generate_series(1, 100) u, affinity.top_items(model, u, 5) t
  EXCEPT SELECT * FROM upg_before) d;
REVOKE ALL ON FUNCTION affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean, jsonb) FROM regress_upg_reader;
DROP ROLE regress_upg_reader;
