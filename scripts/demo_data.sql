-- scripts/demo_data.sql: invented purchase data for the affinity demo.
--
-- Fernhollow General Store is an invented regional chain in an invented valley: 400 products in
-- 10 categories, 3,000 loyalty-card customers, about 45,000 purchase lines over one year.
-- The data are generated from a planted preference structure, so a reader can check what a
-- fitted model finds:
--   * every customer has one taste segment, a third of them a second one;
--   * every segment favours two categories (a main one and a side one), and within a category
--     it has its own favourite products (a skewed choice around a segment-specific offset);
--   * 12% of purchase lines are store-wide staples, bought by anyone;
--   * quantities are small integers, mostly 1.
-- No random(): every draw is a hash of (row key, seed) mapped to [0, 1), so every run gives the
-- same data. Run it with psql in a database of your own; it replaces the schema `demo`.

\set ON_ERROR_STOP on
SET client_min_messages = warning;

DROP SCHEMA IF EXISTS demo CASCADE;
CREATE SCHEMA demo;

-- A uniform draw in [0, 1) from a key and a seed: the top 53 bits of a 64-bit hash.
CREATE FUNCTION demo.unit(key bigint, seed bigint) RETURNS double precision
LANGUAGE sql IMMUTABLE STRICT PARALLEL SAFE
RETURN ((hashint8extended(key, seed) >> 11) & 9007199254740991)::float8 / 9007199254740992.0;

-- Categories: names are composed of a category's line names and product words.
CREATE TABLE demo.categories (
	category_id int PRIMARY KEY,
	category text NOT NULL,
	base_price numeric NOT NULL,
	lines text[] NOT NULL,		-- 8 product lines
	words text[] NOT NULL		-- 5 kinds of product
);

INSERT INTO demo.categories VALUES
(1, 'Coffee & Tea', 6.5,
 '{Highland,Morning,Smoky,Riverside,Velvet,"Dark Harbour","Golden Hour","Old Mill"}',
 '{"Coffee Beans","Ground Coffee","Loose Leaf Tea","Tea Bags","Cold Brew Pack"}'),
(2, 'Kitchen', 19,
 '{Slate,Copper,Sage,Ivory,Ember,"Harbour Blue",Oatmeal,Charcoal}',
 '{"Pour-Over Kettle","Chef Knife","Frying Pan","Mixing Bowl","Storage Jar"}'),
(3, 'Baking', 4.5,
 '{Stoneground,Country,Farmhouse,"Rye Valley",Golden,Orchard,Sunday,"Miller''s"}',
 '{"Bread Flour","Sourdough Starter","Loaf Tin","Vanilla Extract","Cake Mix"}'),
(4, 'Garden', 7,
 '{Wildflower,Tomato,Herb,Cottage,Balcony,Rose,Meadow,Allotment}',
 '{"Seed Packet","Potting Compost",Planter,"Watering Can","Plant Feed"}'),
(5, 'Tools', 14,
 '{Steel,"Ash Wood",Ratchet,Pocket,"Heavy Duty",Precision,Folding,Workshop}',
 '{"Hand Trowel","Pruning Shears","Claw Hammer","Screwdriver Set","Work Gloves"}'),
(6, 'Camping', 24,
 '{Ridge,Summit,Fell,Bothy,Tarn,Moorland,Alpine,Lakeside}',
 '{"Trail Flask","Camp Stove","Head Torch","Sleeping Mat","Day Pack"}'),
(7, 'Pet Care', 8,
 '{Salmon,Chicken,Grain-Free,Cosy,Puppy,Senior,Country,Woodland}',
 '{"Dog Biscuits","Cat Food","Chew Toy","Pet Bed","Grooming Brush"}'),
(8, 'Toys & Games', 12,
 '{Dragon,Ocean,Space,Farmyard,Castle,Jungle,Rainbow,Robot}',
 '{"Jigsaw Puzzle","Board Game","Building Blocks","Plush Toy",Kite}'),
(9, 'Stationery', 5,
 '{Dotted,Linen,Kraft,Pocket,A4,Botanical,Classic,Recycled}',
 '{Notebook,"Fountain Pen","Sketch Pad","Colouring Pencils","Wall Planner"}'),
(10, 'Bath & Body', 6,
 '{Lavender,Seaweed,Oatmilk,Cedar,"Rose Hip",Citrus,Honey,Eucalyptus}',
 '{"Soap Bar","Bath Salts","Hand Cream","Body Wash",Candle}');

-- Taste segments: a main and a side category, and how much of the segment's buying goes to the
-- main one.
CREATE TABLE demo.segments (
	segment_id int PRIMARY KEY,
	segment text NOT NULL,
	main_category int NOT NULL REFERENCES demo.categories,
	side_category int NOT NULL REFERENCES demo.categories,
	main_share double precision NOT NULL
);

INSERT INTO demo.segments VALUES
(1, 'home baristas',  1, 2, 0.65),
(2, 'weekend bakers', 3, 2, 0.60),
(3, 'gardeners',      4, 5, 0.65),
(4, 'hill walkers',   6, 5, 0.75),
(5, 'pet households', 7, 4, 0.70),
(6, 'young families', 8, 9, 0.60),
(7, 'self-care',     10, 1, 0.70);

-- Products: 40 per category, ids category * 100 + 1 .. category * 100 + 40. Product k combines
-- word k % 5 with line (k / 5 + k % 5) % 8, which is a different pair for each k. Lower k sells
-- more (see the skewed draw below).
CREATE TABLE demo.products (
	product_id bigint PRIMARY KEY,
	name text NOT NULL UNIQUE,
	category text NOT NULL,
	price numeric(8, 2) NOT NULL
);

INSERT INTO demo.products
SELECT c.category_id * 100 + k + 1,
	   c.lines[1 + (k / 5 + k % 5) % 8] || ' ' || c.words[1 + k % 5],
	   c.category,
	   round(c.base_price * (0.6 + 1.4 * demo.unit(c.category_id * 100 + k, 7))::numeric, 0) - 0.01
FROM demo.categories c, generate_series(0, 39) AS k;

-- Customers: one or two segments each, and a number of purchase lines (4 .. 31, skewed low).
CREATE TEMP TABLE shopper AS
SELECT id AS customer_id,
	   1 + s1 AS seg1,
	   CASE WHEN demo.unit(id, 2) < 0.35
			THEN 1 + (s1 + 1 + floor(6 * demo.unit(id, 3))::int) % 7 END AS seg2,
	   4 + floor(28 * power(demo.unit(id, 4), 1.5))::int AS n_lines,
	   (ARRAY['Ashcombe', 'Millbrook Vale', 'Oxley Ford', 'Tarnwick', 'Hollin Cross',
			  'Wrenfield'])[1 + floor(6 * demo.unit(id, 5))::int] AS town
FROM generate_series(50001, 53000) AS id,
	 LATERAL (SELECT floor(7 * demo.unit(id, 1))::int AS s1) AS d;

CREATE TABLE demo.customers (
	customer_id bigint PRIMARY KEY,
	name text NOT NULL,
	segment text NOT NULL
);

INSERT INTO demo.customers
SELECT s.customer_id,
	   format('card %s, %s', s.customer_id, s.town),
	   a.segment || coalesce(' + ' || b.segment, '')
FROM shopper s
JOIN demo.segments a ON a.segment_id = s.seg1
LEFT JOIN demo.segments b ON b.segment_id = s.seg2;

-- Purchase lines. Each line draws: staple or taste; which of the customer's segments; main or
-- side category; a product by a skewed rank (rank = 40 u^2.2, so the first few dominate),
-- shifted by a per-segment offset in the side category; a quantity; a day of the year.
CREATE TABLE demo.purchases (
	customer_id bigint NOT NULL REFERENCES demo.customers,
	product_id bigint NOT NULL REFERENCES demo.products,
	quantity int NOT NULL,
	bought_at date NOT NULL
);

INSERT INTO demo.purchases
WITH line AS (
	SELECT s.customer_id, s.seg1, s.seg2, n,
		   s.customer_id * 64 + n AS key
	FROM shopper s, generate_series(1, 32) AS n
	WHERE n <= s.n_lines
), draw AS (
	SELECT l.customer_id,
		   demo.unit(key, 11) < 0.12 AS staple,
		   CASE WHEN l.seg2 IS NOT NULL AND demo.unit(key, 12) < 0.35 THEN l.seg2 ELSE l.seg1 END AS seg,
		   demo.unit(key, 13) AS u_cat,
		   demo.unit(key, 14) AS u_item,
		   1 + floor(4 * power(demo.unit(key, 15), 4))::int AS quantity,
		   date '2025-01-01' + floor(365 * demo.unit(key, 16))::int AS bought_at
	FROM line l
)
SELECT d.customer_id,
	   CASE
		   WHEN d.staple THEN (1 + floor(10 * d.u_cat)::int) * 100 + 1 + floor(2 * d.u_item)::int
		   WHEN d.u_cat < g.main_share
			   THEN g.main_category * 100 + 1 + floor(40 * power(d.u_item, 2.2))::int
		   ELSE g.side_category * 100 + 1
				+ (floor(40 * power(d.u_item, 2.2))::int + (g.segment_id * 13) % 40) % 40
	   END,
	   d.quantity,
	   d.bought_at
FROM draw d
JOIN demo.segments g ON g.segment_id = d.seg;

DROP TABLE shopper;

-- The answer key: the categories each customer's planted tastes favour. The demo compares
-- recommendations with it; the model never sees it.
CREATE VIEW demo.customer_tastes AS
SELECT DISTINCT c.customer_id, k.category
FROM demo.customers c
CROSS JOIN LATERAL string_to_table(c.segment, ' + ') AS t(segment)
JOIN demo.segments g ON g.segment = t.segment
JOIN demo.categories k ON k.category_id IN (g.main_category, g.side_category);

CREATE INDEX ON demo.purchases (customer_id);
ANALYZE demo.products, demo.customers, demo.purchases;
