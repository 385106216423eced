--
-- Upgrades: a model stored under version 1.0 serves unchanged after
-- ALTER EXTENSION affinity UPDATE.
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
ALTER EXTENSION affinity UPDATE;
SELECT extversion FROM pg_extension WHERE extname = 'affinity';
SELECT to_regclass('affinity.models') IS NOT NULL AS registry_in_1_1;
SELECT affinity.describe(model)->>'checksum' = c AS same_value FROM upg_model, upg_checksum;
SELECT count(*) AS differences FROM (
  SELECT u AS user_id, t.* FROM upg_model, generate_series(1, 100) u, affinity.top_items(model, u, 5) t
  EXCEPT SELECT * FROM upg_before) d;
-- and the stored model can enter the registry's world
SELECT affinity.define_model('upgraded', 'SELECT user_id, item_id, weight FROM upg_buys');
SELECT (affinity.refresh('upgraded'))->'version';
