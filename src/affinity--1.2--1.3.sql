/* src/affinity--1.2--1.3.sql */

-- complain if script is sourced in psql, rather than via ALTER EXTENSION
\echo Use "ALTER EXTENSION affinity UPDATE TO '1.3'" to load this file. \quit

-- 1.3, in sections:
--   Mixed keys: bigint users with text items and text users with bigint
--     items, in the fit, the serving functions and the registry.
--   Serving: where each row came from, the batch's filters and fallback,
--     one order of the leading arguments.
--   Evaluation: held-out statements that do not copy a model per row.
-- Each section stands alone; later changes of 1.3 go in sections of their
-- own at the end.

-- Mixed keys --------------------------------------------------------------

-- Serving -----------------------------------------------------------------

-- Evaluation --------------------------------------------------------------
-- No object changes here: ranking_metrics keeps its signatures.  The held-out
-- statements read each model once when each model is scored in a subquery of
-- its own over the held-out rows (README, "Held-out statements"); the hint of
-- the second-model error and the final function (src/pg/metrics.c) changed.
