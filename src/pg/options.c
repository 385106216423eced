/*
 * options.c
 *		The jsonb options of affinity.fit.
 *
 * Each option left out of the jsonb takes the GUC of the same name where
 * one exists, then the built-in default.  Unknown keys, wrong types and
 * out-of-range values are errors that name the option and the value.
 * Options that the chosen method does not use are accepted and ignored, so
 * one grid of options can drive several methods.
 */
#include "affinity_pg.h"

#include <limits.h>
#include <math.h>

#include "utils/builtins.h"
#include "utils/numeric.h"

#define OPTION_NAMES "method, factors, iterations, regularization, alpha, confidence, " \
	"epsilon, solver, cg_steps, seed, threads, min_user_interactions, " \
	"min_item_interactions, neighbors, max_items, verbose"

/* Built-in L2 penalty of each method (documented in the README). */
double
method_default_regularization(int method)
{
	return method == AFF_METHOD_EASE ? 500.0 : 30.0;
}

static void
defaults(FitOptions *o)
{
	o->method = AFF_METHOD_IMPLICIT_ALS;
	o->factors = affinity_factors;
	o->iterations = affinity_iterations;
	o->solver = AFF_SOLVER_CG;
	o->cg_steps = 3;
	o->confidence = AFF_CONFIDENCE_LOG;
	o->threads = affinity_threads;
	o->min_user_interactions = 1;
	o->min_item_interactions = 1;
	o->neighbors = 100;
	o->max_items = 20000;
	o->regularization = -1;
	o->alpha = affinity_alpha;
	o->epsilon = 1.0;
	o->seed = 42;
	o->verbose = affinity_verbose;
}

static void
bad_value(const char *key, const char *shown, const char *want)
{
	ereport(ERROR,
			(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
			 errmsg("invalid value for affinity.fit option \"%s\"", key),
			 errdetail("The value given is %s.", shown),
			 errhint("\"%s\" takes %s.", key, want)));
}

static char *
show_value(JsonbValue *v)
{
	switch (v->type)
	{
		case jbvNull:
			return "null";
		case jbvBool:
			return v->val.boolean ? "true" : "false";
		case jbvString:
			return psprintf("\"%.*s\"", v->val.string.len, v->val.string.val);
		case jbvNumeric:
			return DatumGetCString(DirectFunctionCall1(numeric_out,
													   NumericGetDatum(v->val.numeric)));
		default:
			return "a nested array or object";
	}
}

/* An integer option in [lo, hi]. */
static int64
int_value(const char *key, JsonbValue *v, int64 lo, int64 hi)
{
	char	   *text;
	char	   *end;
	long long	x;

	if (v->type != jbvNumeric)
		bad_value(key, show_value(v), psprintf("an integer from " INT64_FORMAT " to " INT64_FORMAT, lo, hi));
	text = show_value(v);
	errno = 0;
	x = strtoll(text, &end, 10);
	if (errno != 0 || *end != '\0' || x < lo || x > hi)
		bad_value(key, text, psprintf("an integer from " INT64_FORMAT " to " INT64_FORMAT, lo, hi));
	return (int64) x;
}

/* A real option, finite, >= lo (or > lo when open). */
static double
real_value(const char *key, JsonbValue *v, double lo, bool open)
{
	double		x;

	if (v->type != jbvNumeric)
		bad_value(key, show_value(v), "a number");
	x = DatumGetFloat8(DirectFunctionCall1(numeric_float8,
										   NumericGetDatum(v->val.numeric)));
	if (!isfinite(x) || x < lo || (open && x == lo))
		bad_value(key, show_value(v),
				  psprintf("a finite number %s %g", open ? "above" : "of at least", lo));
	return x;
}

/* A string option, matched against choices; returns the index. */
static int
choice_value(const char *key, JsonbValue *v, const char *const *choices, int n,
			 const char *want)
{
	int			i;

	if (v->type == jbvString)
		for (i = 0; i < n; i++)
			if (strlen(choices[i]) == (size_t) v->val.string.len &&
				strncmp(choices[i], v->val.string.val, v->val.string.len) == 0)
				return i;
	bad_value(key, show_value(v), want);
	return -1;					/* not reached */
}

static void
set_option(FitOptions *o, const char *key, JsonbValue *v)
{
	static const char *const methods[] = {"implicit_als", "popularity", "ease", "item_knn"};
	static const char *const solvers[] = {"cg", "cholesky"};
	static const char *const confidences[] = {"linear", "log"};

	if (strcmp(key, "method") == 0)
		o->method = choice_value(key, v, methods, 4,
								 "one of \"implicit_als\", \"popularity\", \"ease\", \"item_knn\"") + 1;
	else if (strcmp(key, "factors") == 0)
		o->factors = (int) int_value(key, v, 1, AFF_MAX_FACTORS);
	else if (strcmp(key, "iterations") == 0)
		o->iterations = (int) int_value(key, v, 1, 10000);
	else if (strcmp(key, "regularization") == 0)
		o->regularization = real_value(key, v, 0.0, true);
	else if (strcmp(key, "alpha") == 0)
		o->alpha = real_value(key, v, 0.0, false);
	else if (strcmp(key, "confidence") == 0)
		o->confidence = choice_value(key, v, confidences, 2, "\"linear\" or \"log\"") + 1;
	else if (strcmp(key, "epsilon") == 0)
		o->epsilon = real_value(key, v, 0.0, true);
	else if (strcmp(key, "solver") == 0)
		o->solver = choice_value(key, v, solvers, 2, "\"cg\" or \"cholesky\"") + 1;
	else if (strcmp(key, "cg_steps") == 0)
		o->cg_steps = (int) int_value(key, v, 1, 1000);
	else if (strcmp(key, "seed") == 0)
		o->seed = int_value(key, v, PG_INT64_MIN, PG_INT64_MAX);
	else if (strcmp(key, "threads") == 0)
		o->threads = (int) int_value(key, v, 0, 1024);
	else if (strcmp(key, "min_user_interactions") == 0)
		o->min_user_interactions = (int) int_value(key, v, 1, INT_MAX);
	else if (strcmp(key, "min_item_interactions") == 0)
		o->min_item_interactions = (int) int_value(key, v, 1, INT_MAX);
	else if (strcmp(key, "neighbors") == 0)
		o->neighbors = (int) int_value(key, v, 1, INT_MAX);
	else if (strcmp(key, "max_items") == 0)
		o->max_items = (int) int_value(key, v, 1, INT_MAX);
	else if (strcmp(key, "verbose") == 0)
	{
		if (v->type != jbvBool)
			bad_value(key, show_value(v), "true or false");
		o->verbose = v->val.boolean;
	}
	else
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("unknown affinity.fit option \"%s\"", key),
				 errhint("Valid options are: %s.", OPTION_NAMES)));
}

/*
 * Fill o from options (may be NULL), the GUCs and the built-in defaults.
 * threads comes back resolved to a positive count.
 */
void
fit_options_parse(Jsonb *options, FitOptions *o)
{
	defaults(o);
	if (options != NULL)
	{
		JsonbIterator *it;
		JsonbValue	v;
		JsonbIteratorToken tok;
		char	   *key = NULL;

		if (!JB_ROOT_IS_OBJECT(options))
			ereport(ERROR,
					(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
					 errmsg("affinity.fit options must be a jsonb object"),
					 errhint("Write them like '{\"factors\": 32, \"iterations\": 10}'.")));
		it = JsonbIteratorInit(&options->root);
		while ((tok = JsonbIteratorNext(&it, &v, true)) != WJB_DONE)
		{
			if (tok == WJB_KEY)
				key = pnstrdup(v.val.string.val, v.val.string.len);
			else if (tok == WJB_VALUE)
				set_option(o, key, &v);
		}
	}
	if (o->regularization < 0)
		o->regularization = affinity_regularization >= 0 ?
			affinity_regularization : method_default_regularization(o->method);
	if (o->regularization <= 0 && o->method == AFF_METHOD_IMPLICIT_ALS)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("implicit_als needs a positive regularization"),
				 errdetail("affinity.regularization is %g.", o->regularization),
				 errhint("Set the option \"regularization\" to a positive number such as 0.1.")));
	o->threads = resolve_threads(o->threads);
}
