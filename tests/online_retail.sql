--
-- tests/online_retail.sql: the Online Retail purchase lines, cleaned once for
-- every user of the open data set: the checks (tests/check_online_retail.py,
-- tests/check_text_keys_retail.py) and the quality benchmark behind
-- docs/quality.md (bench/quality_report.py), so that tested and published
-- figures come from the same rows.
--
-- Run by clean_online_retail() in tests/_common.py on a table raw that holds
-- the CSV as text columns (load_online_retail()); it leaves, in the first
-- schema of the search path:
--   purchases(customer_id, stock_code, quantity, bought_at)  the kept lines
--   products(stock_code, item_id)      dense bigint numbering of the codes
--   lines(user_id, item_id, quantity, bought_at)  purchases keyed by item_id
--   retail_weights(before, measure)    one row per (customer, item) bought
--                                      before a time, with its weight
--

-- Cleaning: drop cancellations (invoice numbers starting with C), lines with
-- no positive quantity, guest orders (no CustomerID), and the non-product
-- codes (postage, carriage, manual adjustments, bank charges, fees): product
-- stock codes start with five digits, these do not.
CREATE TABLE purchases AS
SELECT ("CustomerID"::numeric)::bigint AS customer_id,
       "StockCode"                     AS stock_code,
       "Quantity"::integer             AS quantity,
       "InvoiceDate"::timestamp        AS bought_at
  FROM raw
 WHERE "InvoiceNo" NOT LIKE 'C%'
   AND "Quantity"::integer > 0
   AND coalesce(btrim("CustomerID"), '') <> ''
   AND "StockCode" ~ '^[0-9]{5}';
DROP TABLE raw;

-- dense bigint numbering of the text stock codes, in code order
CREATE TABLE products AS
SELECT stock_code, row_number() OVER (ORDER BY stock_code)::bigint AS item_id
  FROM (SELECT DISTINCT stock_code FROM purchases) s;
CREATE UNIQUE INDEX ON products (stock_code);

CREATE TABLE lines AS
SELECT p.customer_id AS user_id, d.item_id, p.quantity, p.bought_at
  FROM purchases p JOIN products d USING (stock_code);
CREATE INDEX ON lines (bought_at);
ANALYZE lines;

-- Weight of a (customer, item) pair over the lines bought before a time:
-- 'lines' is the number of purchase lines (how many separate order lines held
-- the item: repeated interest, what confidence stands for in implicit
-- feedback, Hu, Koren, Volinsky 2008, section 4), 'quantity' the summed
-- quantity (1 to tens of thousands for wholesale buyers).  docs/quality.md
-- and the checks use 'lines'; any other name is an error.
CREATE FUNCTION retail_weights(before timestamp, measure text DEFAULT 'lines')
RETURNS TABLE (user_id bigint, item_id bigint, weight real)
LANGUAGE plpgsql STABLE AS $$
BEGIN
    IF retail_weights.measure IS DISTINCT FROM 'lines'
       AND retail_weights.measure IS DISTINCT FROM 'quantity' THEN
        RAISE EXCEPTION 'unknown weight measure "%"', retail_weights.measure
            USING HINT = 'Use ''lines'' or ''quantity''.';
    END IF;
    RETURN QUERY
    SELECT l.user_id, l.item_id,
           CASE retail_weights.measure
               WHEN 'lines' THEN count(*)::real
               ELSE sum(l.quantity)::real
           END
      FROM lines l
     WHERE l.bought_at < retail_weights.before
     GROUP BY l.user_id, l.item_id;
END
$$;
