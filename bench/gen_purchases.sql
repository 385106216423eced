-- bench/gen_purchases.sql: an invented purchase table for the benchmarks, deterministic, pure SQL.
--
-- psql variables (all required except part/parts/seed):
--   tbl     table to fill; created UNLOGGED (user_id bigint, item_id bigint, weight real) if missing
--   rows    purchase lines in total
--   users   customers, ids 1..users
--   items   products, ids 1..items
--   part, parts   generate only rows [part*rows/parts, (part+1)*rows/parts) (default 0 of 1), so
--           that several sessions can fill one table side by side; the union of all parts is the
--           same whatever the split
--   seed    changes every draw (default 1)
--
--   psql -v tbl=purchases -v rows=1000000 -v users=100000 -v items=20000 -f bench/gen_purchases.sql
--
-- Every value is a function of the line number r and the seed alone, through hashint8extended
-- (no random()), so the same parameters give the same multiset of rows.
--
-- The shape of the shop:
--   * G = max(8, items / 400) taste groups. Item index i (0-based, id i + 1) belongs to group
--     i mod G and has rank i div G inside it: low ids are the best-sellers of every group.
--   * Customer activity is skewed: line r goes to customer index floor(users * x^1.4) for a
--     uniform x (the busiest customer has a few hundred lines, the quietest a handful); indices
--     are spread over the ids by a multiplication modulo users, so busy customers are not all
--     small ids.
--   * Each customer has 1 to 3 tastes, each a group drawn with probability falling with the
--     group's index (floor(G * x^2)).
--   * A line picks one of its customer's tastes; three lines in four buy inside that group, at
--     rank floor(group size * x^3) (a power law: rank 0 is bought most), the fourth buys across
--     the whole catalogue at index floor(items * x^3) (the global best-sellers).
--   * The quantity (the weight) is mostly 1, sometimes 2, now and then 4 or 5.
--   * The same customer may buy the same item on several lines; the fit sums them.

\set ON_ERROR_STOP on
\if :{?part}
\else
\set part 0
\endif
\if :{?parts}
\else
\set parts 1
\endif
\if :{?seed}
\else
\set seed 1
\endif

CREATE UNLOGGED TABLE IF NOT EXISTS :tbl (user_id bigint NOT NULL, item_id bigint NOT NULL, weight real NOT NULL);

INSERT INTO :tbl (user_id, item_id, weight)
SELECT 1 + (cust * 1000003) % :users AS user_id,
	   1 + CASE WHEN (h2 & 3) <> 0
				THEN least(taste + groups * floor(((:items - 1 - taste) / groups + 1) * x_rank * x_rank * x_rank)::bigint,
						   :items - 1)
				ELSE floor(:items * x_rank * x_rank * x_rank)::bigint
		   END AS item_id,
	   (1 + (CASE WHEN (h2 >> 8) & 7 = 0 THEN 1 ELSE 0 END)
		  + (CASE WHEN (h2 >> 12) & 31 = 0 THEN 3 ELSE 0 END))::real AS weight
FROM (
	SELECT h2, x_rank, cust, groups,
		   floor(groups * power(((hashint8extended(cust * 4 + (h2 >> 20 & 255) % (1 + (hu & 255) % 3), :seed + 3) >> 11)
								 & 4294967295)::float8 / 4294967296::float8, 2))::bigint AS taste
	FROM (
		SELECT h2, x_rank, cust, groups, hashint8extended(cust, :seed + 2) AS hu
		FROM (
			SELECT h2,
				   ((h1 >> 32) & 4294967295)::float8 / 4294967296::float8 AS x_rank,
				   least(floor(:users * power((h1 & 4294967295)::float8 / 4294967296::float8, 1.4))::bigint,
						 :users - 1) AS cust,
				   greatest(8, :items / 400)::bigint AS groups
			FROM (
				SELECT hashint8extended(r, :seed) AS h1, hashint8extended(r, :seed + 1) AS h2
				FROM generate_series((:part::bigint * :rows) / :parts,
									 ((:part::bigint + 1) * :rows) / :parts - 1) AS r
			) hashed
		) drawn
	) with_user
) with_taste;
