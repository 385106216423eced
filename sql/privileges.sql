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
SELECT has_function_privilege('affinity.top_items(affinity.model, bigint, integer, boolean, bigint[], bigint[], boolean)',
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

-- clean up: roles outlive the database
DROP TABLE priv_buys;
DROP ROLE regress_affinity_reader;
DROP ROLE regress_affinity_outsider;
