#!/usr/bin/python3
"""Print product recommendations from a named affinity model.

    recommend.py [--dsn DSN] [--model NAME] [-n N] customer CUSTOMER_ID
    recommend.py [--dsn DSN] [--model NAME] [-n N] basket PRODUCT_ID [PRODUCT_ID ...]

"customer" lists the top N products for a loyalty-card customer, leaving out
what they already bought; a customer the model does not know yet gets the
best-sellers. "basket" lists the top N products for a guest's cart, which
the model has never seen: it works from the products in the cart alone.

The connection string comes from --dsn, else from the AFFINITY_DSN
environment variable, else from libpq's own environment (PGHOST, PGPORT,
PGDATABASE, ...). The model is one registered with affinity.define_model and
fitted by affinity.refresh; the product names come from the shop's
products(product_id, name, category) table, here demo.products.

Every value goes to the server as a bound parameter (the %s placeholders of
psycopg2), never pasted into the SQL text.
"""

import argparse
import os
import sys

import psycopg2

# The top N for one customer. With fallback_popular => false a customer the
# model does not know gets no rows, so the caller can say so and ask again
# with the best-sellers.
CUSTOMER_SQL = """
SELECT r.rank, p.name, p.category, r.score
FROM affinity.top_items(affinity.get_model(%s), %s::bigint, %s::integer,
                        fallback_popular => %s) AS r
JOIN demo.products AS p ON p.product_id = r.item_id
ORDER BY r.rank
"""

# The top N for a cart of products; the cart itself is left out.
BASKET_SQL = """
SELECT r.rank, p.name, p.category, r.score
FROM affinity.top_items(affinity.get_model(%s), %s::bigint[], %s::integer) AS r
JOIN demo.products AS p ON p.product_id = r.item_id
ORDER BY r.rank
"""

CART_SQL = """
SELECT p.name FROM demo.products AS p
WHERE p.product_id = ANY(%s::bigint[])
ORDER BY array_position(%s::bigint[], p.product_id)
"""

MODEL_SQL = "SELECT version, fitted_at FROM affinity.models WHERE name = %s"


def recommend_for_customer(cur, model, customer_id, n):
    """Return (rows, personal): personal is False when the list is the best-sellers."""
    cur.execute(CUSTOMER_SQL, (model, customer_id, n, False))
    rows = cur.fetchall()
    if rows:
        return rows, True
    cur.execute(CUSTOMER_SQL, (model, customer_id, n, True))
    return cur.fetchall(), False


def recommend_for_basket(cur, model, product_ids, n):
    cur.execute(BASKET_SQL, (model, product_ids, n))
    return cur.fetchall()


def print_rows(rows):
    for rank, name, category, score in rows:
        print("%2d. %-32s %-14s %7.3f" % (rank, name, category, score))


def main():
    parser = argparse.ArgumentParser(description="Product recommendations from an affinity model.")
    parser.add_argument("--dsn", default=os.environ.get("AFFINITY_DSN", ""),
                        help="libpq connection string (default: $AFFINITY_DSN, then the PG* variables)")
    parser.add_argument("--model", default="shop_picks", help="registered model name (default: shop_picks)")
    parser.add_argument("-n", type=int, default=5, help="how many products (default: 5)")
    parser.add_argument("mode", choices=["customer", "basket"])
    parser.add_argument("ids", type=int, nargs="+", metavar="ID",
                        help="a customer id, or the product ids in the cart")
    args = parser.parse_args()
    if args.mode == "customer" and len(args.ids) != 1:
        parser.error("give one customer id")

    try:
        conn = psycopg2.connect(args.dsn)
    except psycopg2.Error as e:
        sys.exit("cannot connect: %s" % e)
    try:
        with conn, conn.cursor() as cur:
            cur.execute(MODEL_SQL, (args.model,))
            found = cur.fetchone()
            if found:
                print('Model "%s", version %s, fitted %s'
                      % (args.model, found[0], found[1].strftime("%Y-%m-%d %H:%M") if found[1] else "never"))
            if args.mode == "customer":
                rows, personal = recommend_for_customer(cur, args.model, args.ids[0], args.n)
                if personal:
                    print("Top %d for customer %d:" % (args.n, args.ids[0]))
                else:
                    print("No personal picks for customer %d yet; the best-sellers:" % args.ids[0])
            else:
                cur.execute(CART_SQL, (args.ids, args.ids))
                cart = [name for (name,) in cur.fetchall()]
                rows = recommend_for_basket(cur, args.model, args.ids, args.n)
                print("Top %d for a cart of %s:" % (args.n, ", ".join(cart) or "unknown products"))
            print_rows(rows)
    except psycopg2.Error as e:
        sys.exit("error: %s" % (e.diag.message_primary or e))
    finally:
        conn.close()


if __name__ == "__main__":
    main()
