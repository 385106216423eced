--
-- Privileges: what an ordinary role can and cannot do with the extension,
-- and how the extension's functions run (not as their owner, with a fixed
-- search path where it matters).
--
-- Roles are cluster-wide: the ones made here carry the regress_ prefix and
-- are dropped at the end.
--
CREATE ROLE regress_affinity_reader NOLOGIN;
CREATE ROLE regress_affinity_outsider NOLOGIN;

CREATE TABLE priv_buys AS
SELECT u::bigint AS user_id, ((u * 7 + j * 3) % 15 + 1)::bigint AS item_id,
       (1 + (u + j) % 3)::real AS weight
FROM generate_series(1, 40) u, generate_series(1, 4) j;
GRANT SELECT ON priv_buys TO regress_affinity_reader;

-- The reader holds SELECT on the table and nothing else: no grant on the
-- extension's schema, functions or type beyond what every role has.
SET ROLE regress_affinity_reader;
SELECT current_user, has_schema_privilege('affinity', 'USAGE') AS schema_usage;
SELECT has_function_privilege('affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean, jsonb)',
                              'EXECUTE') AS can_serve,
       has_type_privilege('affinity.model', 'USAGE') AS can_use_type;

-- it fits from the table it may read...
SELECT d->>'method' AS method, d->'users' AS users, d->'items' AS items
FROM (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
             '{"factors": 4, "iterations": 3, "threads": 1}')) AS d
      FROM priv_buys) s;
SELECT d->>'method' AS method, d->'items' AS items
FROM (SELECT affinity.describe(affinity.fit(user_id, item_id, weight,
             '{"method": "popularity"}')) AS d
      FROM priv_buys) s;

-- ... keeps the model in a table of its own and serves from it
CREATE TEMP TABLE priv_models AS
SELECT affinity.fit(user_id, item_id, weight, '{"method": "popularity"}') AS model
FROM priv_buys;
SELECT item_id, rank FROM priv_models, affinity.top_items(model, 1, 3);
SELECT count(*) AS rows FROM priv_models, affinity.top_items(model, 999, 5);
SELECT affinity.score(model, 1, 1) IS NOT NULL AS scored FROM priv_models;

-- but cannot lift a superuser-only setting
SET affinity.max_threads = 64;
-- nor write the model registry: refresh runs the stored query as the role
-- that calls it (a scheduled job's owner), so only roles granted rights on
-- affinity.models may store one
\set SHOW_CONTEXT never
SELECT affinity.define_model('regress_priv_model', 'SELECT user_id, item_id, weight FROM priv_buys');
\set SHOW_CONTEXT errors
DROP TABLE priv_models;
RESET ROLE;

-- The outsider has no SELECT on the table: the fit never sees a row.
SET ROLE regress_affinity_outsider;
SELECT affinity.fit(user_id, item_id, weight) FROM priv_buys;
-- it still fits and serves from rows it may read
SELECT count(*) AS rows
FROM affinity.top_items((SELECT affinity.fit(u, i, 1, '{"method": "popularity"}')
                         FROM (VALUES (1::bigint, 10::bigint), (2, 10), (2, 11)) v(u, i)), 1, 5);
RESET ROLE;

-- No function of the extension runs with its owner's rights.
SELECT count(*) > 0 AS has_functions, count(*) FILTER (WHERE p.prosecdef) AS security_definer
FROM pg_proc p
JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid
                 AND d.refclassid = 'pg_extension'::regclass AND d.deptype = 'e'
JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity';

-- Search path: a C function resolves no names at run time; an aggregate runs
-- its C support functions; any other function (SQL, PL/pgSQL) must pin
-- search_path in proconfig, or a caller's schema could shadow what it calls.
-- Every such function is listed with its verdict; "GAP" means unpinned.
SELECT CASE WHEN l.lanname = 'c' THEN 'C function'
            WHEN p.prokind = 'a' THEN 'aggregate'
            WHEN EXISTS (SELECT 1 FROM unnest(p.proconfig) c WHERE c LIKE 'search_path=%')
                 THEN 'search_path set'
            ELSE 'GAP' END AS verdict,
       count(*) > 0 AS present
FROM pg_proc p
JOIN pg_language l ON l.oid = p.prolang
JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid
                 AND d.refclassid = 'pg_extension'::regclass AND d.deptype = 'e'
JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
GROUP BY 1 ORDER BY 1;
SELECT p.oid::regprocedure AS function, l.lanname AS language,
       coalesce(array_to_string(p.proconfig, ', '), 'no settings') AS settings,
       CASE WHEN EXISTS (SELECT 1 FROM unnest(p.proconfig) c WHERE c LIKE 'search_path=%')
            THEN 'search_path set' ELSE 'GAP' END AS verdict
FROM pg_proc p
JOIN pg_language l ON l.oid = p.prolang
JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid
                 AND d.refclassid = 'pg_extension'::regclass AND d.deptype = 'e'
JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
WHERE l.lanname <> 'c' AND p.prokind <> 'a'
ORDER BY p.oid::regprocedure::text;

-- The extension is not trusted: only a superuser may create it.
SELECT extname, (SELECT trusted FROM pg_available_extension_versions v
                 WHERE v.name = e.extname AND v.version = e.extversion) AS trusted
FROM pg_extension e WHERE extname = 'affinity';

-- The registry is a security boundary.  A model's query is checked and run
-- only in a session logged in as its owner, with the owner as session user
-- and current user; only the owner changes the model.  Each attack below
-- is made by regress_definer, a role that may only define models: its query
-- calls a function that switches back to whoever the session really is
-- (set_config('role', 'none')) and then tries to create a superuser and to
-- copy a table it may not read.  What it achieved is recorded in a table of
-- its own; after each attack the test shows that table and the roles.
\set SHOW_CONTEXT never
SELECT current_user AS superuser \gset
CREATE ROLE regress_operator SUPERUSER LOGIN;	-- the superuser who refreshes
CREATE ROLE regress_definer LOGIN;
CREATE ROLE regress_definer_member LOGIN IN ROLE regress_definer;
CREATE ROLE regress_stranger LOGIN;
CREATE ROLE regress_definer_helper NOLOGIN ROLE regress_definer;
GRANT SELECT, INSERT, UPDATE, DELETE ON affinity.models TO regress_definer, regress_stranger;
GRANT SELECT, INSERT, DELETE ON affinity.model_history TO regress_definer, regress_stranger;
GRANT SELECT ON priv_buys TO regress_definer;
CREATE SCHEMA regress_defs AUTHORIZATION regress_definer;
-- a table only the superuser and the owner's member may read
CREATE TABLE priv_secret AS SELECT 'payroll of the shop'::text AS note;
GRANT SELECT ON priv_secret TO regress_definer_member;

\c - regress_definer
CREATE TABLE regress_defs.loot (who name, super boolean, note text);
GRANT INSERT ON regress_defs.loot TO PUBLIC;
CREATE FUNCTION regress_defs.escalate() RETURNS bigint LANGUAGE plpgsql AS $$
BEGIN
	PERFORM set_config('role', 'none', true);
	INSERT INTO regress_defs.loot
		SELECT current_user, rolsuper, NULL FROM pg_roles WHERE rolname = current_user;
	IF (SELECT rolsuper FROM pg_roles WHERE rolname = current_user)
	   AND NOT EXISTS (SELECT FROM pg_roles WHERE rolname = 'regress_usurper') THEN
		CREATE ROLE regress_usurper SUPERUSER;
	END IF;
	IF has_table_privilege('public.priv_secret', 'SELECT') THEN
		INSERT INTO regress_defs.loot SELECT current_user, NULL, note FROM public.priv_secret;
	END IF;
	RETURN 0;
END $$;
SELECT affinity.define_model('regress_trojan',
  'SELECT user_id, item_id, weight FROM public.priv_buys CROSS JOIN (SELECT regress_defs.escalate() AS e) AS x',
  '{"method": "popularity"}');
\c - regress_operator
CREATE VIEW priv_outcome AS
SELECT (SELECT count(*) FROM pg_roles WHERE rolname = 'regress_usurper') AS usurpers,
       (SELECT count(*) FROM regress_defs.loot WHERE super) AS runs_as_superuser,
       (SELECT count(*) FROM regress_defs.loot WHERE note IS NOT NULL) AS secrets_copied,
       (SELECT coalesce(string_agg(DISTINCT who, ', '), 'none') FROM regress_defs.loot) AS ran_as;

-- attack 1: a superuser refreshes the model
SELECT affinity.refresh('regress_trojan');
SELECT * FROM priv_outcome;
-- attack 2: a superuser who first takes the owner's role or identity
SET ROLE regress_definer;
SELECT affinity.refresh('regress_trojan');
RESET ROLE;
SET SESSION AUTHORIZATION regress_definer;
SELECT affinity.refresh('regress_trojan');
RESET SESSION AUTHORIZATION;
SELECT * FROM priv_outcome;
-- attack 3: a member of the owner, who may read the secret, refreshes it,
-- as itself and after SET ROLE to the owner
\c - regress_definer_member
SELECT affinity.refresh('regress_trojan');
SET ROLE regress_definer;
SELECT affinity.refresh('regress_trojan');
RESET ROLE;
\c - regress_operator
SELECT * FROM priv_outcome;
-- attack 4: a SECURITY DEFINER wrapper of the owner's that a superuser's
-- job calls; the query leaves a search path behind in the caller's session,
-- so that the caller's next now() runs the owner's code
\c - regress_definer
CREATE FUNCTION regress_defs.now() RETURNS timestamptz LANGUAGE plpgsql AS $$
BEGIN
	INSERT INTO regress_defs.loot
		SELECT current_user, rolsuper, 'now() shadowed' FROM pg_roles WHERE rolname = current_user;
	RETURN pg_catalog.now();
END $$;
CREATE FUNCTION regress_defs.plant() RETURNS bigint LANGUAGE plpgsql AS $$
BEGIN
	PERFORM pg_catalog.set_config('search_path', 'regress_defs, pg_catalog, public', false);
	RETURN 0;
END $$;
SELECT affinity.define_model('regress_planter',
  'SELECT user_id, item_id, weight FROM public.priv_buys CROSS JOIN (SELECT regress_defs.plant() AS p) AS x',
  '{"method": "popularity"}');
CREATE FUNCTION regress_defs.refresh_planter() RETURNS jsonb LANGUAGE sql SECURITY DEFINER
	AS $$ SELECT affinity.refresh('regress_planter') $$;
GRANT EXECUTE ON FUNCTION regress_defs.refresh_planter() TO PUBLIC;
\c - regress_operator
SELECT regress_defs.refresh_planter() IS NOT NULL AS refreshed;
SHOW search_path;
SELECT now() IS NOT NULL AS called_now;
RESET search_path;
SELECT * FROM priv_outcome;
-- a superuser's SECURITY DEFINER wrapper, called by the owner, is refused too
CREATE FUNCTION public.priv_refresh_as_superuser(m text) RETURNS jsonb LANGUAGE sql SECURITY DEFINER
	AS $$ SELECT affinity.refresh(m) $$;
GRANT EXECUTE ON FUNCTION public.priv_refresh_as_superuser(text) TO regress_definer;
\c - regress_definer
SELECT public.priv_refresh_as_superuser('regress_trojan');

-- The owner's own refresh works, and the query gains nothing: the switch
-- back lands on the owner itself
SELECT (affinity.refresh('regress_trojan'))->'version' AS version;
\c - regress_operator
SELECT * FROM priv_outcome;
SELECT who, super, note FROM regress_defs.loot ORDER BY 1, 2, 3;
-- a query that switches to another role, even one the owner belongs to, is
-- refused
\c - regress_definer
CREATE FUNCTION regress_defs.switch() RETURNS bigint LANGUAGE plpgsql AS $$
BEGIN
	PERFORM pg_catalog.set_config('role', 'regress_definer_helper', true);
	RETURN 0;
END $$;
SELECT affinity.define_model('regress_switcher',
  'SELECT user_id, item_id, weight FROM public.priv_buys CROSS JOIN (SELECT regress_defs.switch() AS s) AS x',
  '{"method": "popularity"}');
SELECT affinity.refresh('regress_switcher');

-- Another role cannot change what the owner's refresh does, nor its model,
-- history or name, nor take the model over by redefining it
\c - regress_stranger
UPDATE affinity.models SET options = '{"method": "popularity", "min_item_interactions": 100}' WHERE name = 'regress_trojan';
UPDATE affinity.models SET keep_versions = 1 WHERE name = 'regress_trojan';
UPDATE affinity.models SET search_path = 'regress_defs, public' WHERE name = 'regress_trojan';
UPDATE affinity.models SET source_query = 'SELECT 1::bigint AS user_id, 1::bigint AS item_id, 1::real AS weight' WHERE name = 'regress_trojan';
UPDATE affinity.models SET owner = 'regress_stranger' WHERE name = 'regress_trojan';
UPDATE affinity.models SET model = NULL, version = 0 WHERE name = 'regress_trojan';
UPDATE affinity.models SET name = 'regress_stolen' WHERE name = 'regress_trojan';
DELETE FROM affinity.models WHERE name = 'regress_trojan';
INSERT INTO affinity.model_history (name, version, model, fitted_at)
SELECT 'regress_trojan', 99, affinity.fit(1::bigint, 1::bigint, 1::real, '{"method": "popularity"}'), now();
DELETE FROM affinity.model_history WHERE name = 'regress_trojan';
SELECT affinity.define_model('regress_trojan', 'SELECT user_id, item_id, weight FROM public.priv_buys');
SELECT affinity.revert_model('regress_trojan', 1);
-- an insert names its writer as owner, whatever owner it gives
INSERT INTO affinity.models (name, source_query, owner, owner_name)
VALUES ('regress_forged', 'SELECT 1::bigint AS user_id, 1::bigint AS item_id, 1::real AS weight', 'regress_definer', 'regress_definer');
SELECT owner, owner_name FROM affinity.models WHERE name = 'regress_forged';
DELETE FROM affinity.models WHERE name = 'regress_forged';
\c - regress_operator
GRANT TRUNCATE ON affinity.models, affinity.model_history TO regress_stranger;
\c - regress_stranger
TRUNCATE affinity.model_history;
\c - regress_operator
SELECT name, options, keep_versions, search_path, owner, version
FROM affinity.models WHERE name LIKE 'regress\_%' ORDER BY name;
SELECT count(*) AS history_rows FROM affinity.model_history WHERE name = 'regress_trojan';

-- A dropped role's models go to nobody: a new role of the same name does
-- not inherit the query, until a superuser hands the model over
CREATE ROLE regress_ghost LOGIN;
GRANT SELECT, INSERT, UPDATE, DELETE ON affinity.models TO regress_ghost;
GRANT SELECT, INSERT, DELETE ON affinity.model_history TO regress_ghost;
GRANT SELECT ON priv_buys TO regress_ghost;
\c - regress_ghost
SELECT affinity.define_model('regress_haunt', 'SELECT user_id, item_id, weight FROM public.priv_buys',
  '{"method": "popularity"}');
SELECT (affinity.refresh('regress_haunt'))->'version' AS version;
\c - regress_operator
REVOKE ALL ON affinity.models, affinity.model_history, priv_buys FROM regress_ghost;
DROP ROLE regress_ghost;
SELECT owner::oid = 0 OR NOT EXISTS (SELECT FROM pg_roles r WHERE r.oid = owner::oid) AS owner_gone, owner_name
FROM affinity.models WHERE name = 'regress_haunt';
CREATE ROLE regress_ghost LOGIN;
GRANT SELECT, INSERT, UPDATE, DELETE ON affinity.models TO regress_ghost;
GRANT SELECT, INSERT, DELETE ON affinity.model_history TO regress_ghost;
GRANT SELECT ON priv_buys TO regress_ghost;
\c - regress_ghost
SELECT affinity.refresh('regress_haunt');
SELECT affinity.define_model('regress_haunt', 'SELECT user_id, item_id, weight FROM public.priv_buys');
UPDATE affinity.models SET options = '{}' WHERE name = 'regress_haunt';
\c - regress_operator
SELECT affinity.refresh('regress_haunt');
-- a superuser hands it to the new role, after reading the query
UPDATE affinity.models SET owner = 'regress_ghost' WHERE name = 'regress_haunt';
SELECT owner, owner_name FROM affinity.models WHERE name = 'regress_haunt';
\c - regress_ghost
SELECT (affinity.refresh('regress_haunt'))->'version' AS version;
\c - regress_operator

-- define_model needs a session logged in as the role that will own the model
SET ROLE regress_definer;
SELECT affinity.define_model('regress_by_proxy', 'SELECT user_id, item_id, weight FROM public.priv_buys');
RESET ROLE;

\set SHOW_CONTEXT errors

-- clean up: roles outlive the database
\c - :superuser
DELETE FROM affinity.models WHERE name LIKE 'regress\_%';
DROP VIEW priv_outcome;
DROP FUNCTION public.priv_refresh_as_superuser(text);
DROP SCHEMA regress_defs CASCADE;
DROP TABLE priv_secret;
REVOKE ALL ON affinity.models, affinity.model_history FROM regress_definer, regress_stranger, regress_ghost;
REVOKE ALL ON priv_buys FROM regress_definer, regress_ghost;
DROP ROLE regress_definer_helper;
DROP ROLE regress_definer_member;
DROP ROLE regress_definer;
DROP ROLE regress_stranger;
DROP ROLE regress_ghost;
DROP ROLE regress_operator;
DROP ROLE IF EXISTS regress_usurper;
DROP TABLE priv_buys;
DROP ROLE regress_affinity_reader;
DROP ROLE regress_affinity_outsider;
