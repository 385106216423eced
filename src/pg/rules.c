/*
 * rules.c
 *		The rules argument of top_items and the batch: a jsonb object
 *		read into the engine's AffRules (core/rules.h), and the re-ranking
 *		of a request's best items through them.
 *
 *		{"max_per_group": 2, "groups": {"SKU-1": "lamps", "SKU-2": "rugs"},
 *		 "diversity": 0.3, "pool": 200}
 *
 * groups maps item keys (written as text, as jsonb object keys are) to a
 * group name; items it does not name belong to no group and are never
 * capped.  Group names are numbered by sorting them (no hashing of chosen
 * texts, so no crafted names can make the work quadratic).
 */
#include "serving_common.h"

#include <limits.h>
#include <math.h>

#include "miscadmin.h"
#include "utils/builtins.h"
#include "utils/jsonb.h"

#include "text_keys.h"

typedef struct GroupPair
{
	const char *name;
	int			len;
	int32		item;
} GroupPair;

static int
cmp_group_pair(const void *a, const void *b)
{
	const GroupPair *x = a;
	const GroupPair *y = b;
	int			c = memcmp(x->name, y->name, Min(x->len, y->len));

	if (c != 0)
		return c;
	return x->len < y->len ? -1 : (x->len > y->len);
}

static void
bad_rules(const char *detail_fmt, const char *what)
{
	ereport(ERROR,
			(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
			 errmsg("invalid rules"),
			 errdetail(detail_fmt, what),
			 errhint("rules is a jsonb object with any of \"max_per_group\" (an integer >= 1), \"groups\" (an object of item key: group name), \"diversity\" (0 to 1) and \"pool\" (an integer >= 1).")));
}

/* A jsonb number as a double, or an error naming the rule. */
static double
rule_number(JsonbValue *v, const char *name)
{
	if (v->type != jbvNumeric)
		bad_rules("\"%s\" must be a number.", name);
	return DatumGetFloat8(DirectFunctionCall1(numeric_float8,
											  NumericGetDatum(v->val.numeric)));
}

/* The groups object: group[] of every item it names, n_groups. */
static void
read_groups(JsonbContainer *obj, const AffModelView *v, AffRules *r)
{
	JsonbIterator *it = JsonbIteratorInit(obj);
	JsonbValue	kv;
	JsonbIteratorToken tok;
	GroupPair  *pairs;
	int64		n = 0;
	int64		cap = 64;
	int32	   *group;
	int32		g = -1;
	int64		i;

	pairs = palloc(sizeof(GroupPair) * cap);
	group = palloc_extended(sizeof(int32) * v->h->n_items, MCXT_ALLOC_HUGE);
	for (i = 0; i < v->h->n_items; i++)
		group[i] = -1;
	while ((tok = JsonbIteratorNext(&it, &kv, true)) != WJB_DONE)
	{
		int64		item;

		if (tok != WJB_KEY)
			continue;
		item = text_key_lookup(v, false, kv.val.string.val, kv.val.string.len);
		tok = JsonbIteratorNext(&it, &kv, true);
		if (tok != WJB_VALUE)
			bad_rules("%s", "\"groups\" must map item keys to group names.");
		if (kv.type == jbvNull || item < 0)
			continue;			/* no group, or an item the model does not know */
		if (kv.type != jbvString)
			bad_rules("%s", "A group name in \"groups\" must be a string.");
		if (n == cap)
		{
			cap *= 2;
			pairs = repalloc_huge(pairs, sizeof(GroupPair) * cap);
		}
		pairs[n].name = kv.val.string.val;
		pairs[n].len = kv.val.string.len;
		pairs[n].item = (int32) item;
		n++;
		if ((n & 0xffff) == 0)
			CHECK_FOR_INTERRUPTS();
	}
	qsort(pairs, n, sizeof(GroupPair), cmp_group_pair);
	for (i = 0; i < n; i++)
	{
		if (i == 0 || cmp_group_pair(&pairs[i], &pairs[i - 1]) != 0)
			g++;
		group[pairs[i].item] = g;
	}
	pfree(pairs);
	r->group = group;
	r->n_groups = g + 1;
}

/*
 * The rules of argument argno for a request of k items from model v:
 * false when there are none (NULL, or nothing that changes the ranking).
 */
bool
rules_parse(FunctionCallInfo fcinfo, int argno, const AffModelView *v, int64 k, AffRules *r)
{
	Jsonb	   *j;
	JsonbIterator *it;
	JsonbValue	kv;
	JsonbIteratorToken tok;
	int64		pool = -1;

	memset(r, 0, sizeof(*r));
	if (argno < 0 || argno >= PG_NARGS() || PG_ARGISNULL(argno))
		return false;
	j = PG_GETARG_JSONB_P(argno);
	if (!JB_ROOT_IS_OBJECT(j))
		bad_rules("%s", "rules must be a jsonb object.");
	it = JsonbIteratorInit(&j->root);
	while ((tok = JsonbIteratorNext(&it, &kv, true)) != WJB_DONE)
	{
		char	   *name;

		if (tok != WJB_KEY)
			continue;
		name = pnstrdup(kv.val.string.val, kv.val.string.len);
		tok = JsonbIteratorNext(&it, &kv, true);
		if (strcmp(name, "groups") == 0)
		{
			if (kv.type != jbvBinary || !JsonContainerIsObject(kv.val.binary.data))
				bad_rules("%s", "\"groups\" must be an object of item key: group name.");
			read_groups(kv.val.binary.data, v, r);
		}
		else if (strcmp(name, "max_per_group") == 0)
		{
			double		x = rule_number(&kv, name);

			if (!(x >= 1 && x <= INT_MAX) || x != floor(x))
				bad_rules("\"%s\" must be an integer of at least 1.", name);
			r->max_per_group = (int32) x;
		}
		else if (strcmp(name, "diversity") == 0)
		{
			double		x = rule_number(&kv, name);

			if (!(x >= 0 && x <= 1))
				bad_rules("\"%s\" must be between 0 and 1.", name);
			r->diversity = (float) x;
		}
		else if (strcmp(name, "pool") == 0)
		{
			double		x = rule_number(&kv, name);

			if (!(x >= 1 && x <= INT_MAX) || x != floor(x))
				bad_rules("\"%s\" must be an integer of at least 1.", name);
			pool = (int64) x;
		}
		else
			bad_rules("\"%s\" is not a rule.", name);
	}
	if (r->max_per_group > 0 && r->group == NULL)
		bad_rules("%s", "\"max_per_group\" needs \"groups\".");
	if (r->diversity > 0 && model_method(v)->item_row == NULL)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("diversity needs a model that relates items to items"),
				 errdetail("This model was fitted with method \"%s\", which has no item-to-item similarities.",
						   aff_method_name(v->h->method)),
				 errhint("Use \"max_per_group\" alone, or a model of method \"implicit_als\", \"ease\" or \"item_knn\".")));
	/* common practice, no source: a pool of ten times the list, at least 100 */
	if (pool < 0)
		pool = Max(100, 10 * k);
	r->pool = Min(Max(pool, k), v->h->n_items);
	return aff_rules_active(r);
}

typedef struct SimArg
{
	const AffServe *s;
	uint8	   *skip;
} SimArg;

static void
sim_row(void *arg, int64_t it, float *row)
{
	SimArg	   *sa = arg;

	model_method(sa->s->v)->item_row(sa->s, it, row, sa->skip);
}

/* Scratch for rules_rank over pools of at most r->pool items, made once per call. */
RulesScratch *
rules_scratch(const AffModelView *v, const AffRules *r)
{
	RulesScratch *sc = palloc0(sizeof(RulesScratch));

	sc->work = palloc(sizeof(float) * 2 * Max(r->pool, 1));
	if (r->n_groups > 0)
		sc->counts = palloc(sizeof(int32) * r->n_groups);
	if (r->diversity > 0)
	{
		sc->row = palloc_extended(sizeof(float) * v->h->n_items, MCXT_ALLOC_HUGE);
		sc->skip = palloc_extended(v->h->n_items, MCXT_ALLOC_HUGE);
	}
	return sc;
}

/*
 * The rules' best k of pool[0 .. n) (best first, n <= r->pool) into out
 * (k entries); s serves the model with its item norms (for item_row).
 * Returns how many were kept.
 */
int64
rules_rank(const AffServe *s, const AffRules *r, RulesScratch *sc, const AffScored *pool,
		   int64 n, int64 k, AffScored *out)
{
	SimArg		sa;

	AFF_ASSERT(n <= r->pool);
	sa.s = s;
	sa.skip = sc->skip;
	return aff_rules_rank(pool, n, r, k, sim_row, &sa, sc->row, sc->counts, sc->work, out);
}
