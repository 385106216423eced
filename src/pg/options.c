/*
 * options.c
 *		The jsonb options of affinity.fit.
 *
 * Each option left out of the jsonb takes the GUC of the same name where
 * one exists, then the built-in default.  Unknown keys, wrong types and
 * out-of-range values are errors that name the option and the value.  The
 * options, their types and bounds are the engine's table (core/method.c).
 * Options that the chosen method does not use are accepted and ignored, so
 * one grid of options can drive several methods.
 */
#include "affinity_pg.h"

#include <errno.h>
#include <limits.h>
#include <float.h>
#include <math.h>

#include "utils/builtins.h"
#include "utils/numeric.h"

#include "../core/profiles.h"

static void
defaults(FitOptions *o)
{
	memset(o, 0, sizeof(*o));	/* the state is copied as bytes: no stray padding */
	o->method = AFF_METHOD_IMPLICIT_ALS;
	o->factors = affinity_factors;
	o->iterations = affinity_iterations;
	o->solver = AFF_SOLVER_CG;
	o->solver_steps = 3;
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
	o->normalization = AFF_NORM_L2;
	o->min_document_frequency = 1;
	o->window = 10;
	o->successors = 100;
}

/* Which aggregate's options are being read, for messages. */
static const char *option_owner = "affinity.fit";

static void
bad_value(const AffOptionDef *d, const char *shown)
{
	char		want[160];

	aff_option_describe_bounds(d, want, sizeof(want));
	ereport(ERROR,
			(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
			 errmsg("invalid value for %s option \"%s\"", option_owner, d->name),
			 errdetail("The value given is %s.", shown),
			 errhint("\"%s\" takes %s.", d->name, want)));
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
			{
				char	   *text = DatumGetCString(DirectFunctionCall1(numeric_out,
																	   NumericGetDatum(v->val.numeric)));

				/* a number of hundreds of digits is shown in exponent form */
				if (strlen(text) > 30)
					return psprintf("%s", numeric_out_sci(v->val.numeric, 6));
				return text;
			}
		default:
			return "a nested array or object";
	}
}

/* The full text of a jsonb number. */
static char *
numeric_text(JsonbValue *v)
{
	return DatumGetCString(DirectFunctionCall1(numeric_out,
											   NumericGetDatum(v->val.numeric)));
}

/*
 * An integer option of any int64 (the text of the number must be a whole
 * number in range).
 */
static int64
int64_value(const AffOptionDef *d, JsonbValue *v)
{
	char	   *text;
	char	   *end;
	long long	x;

	if (v->type != jbvNumeric)
		bad_value(d, show_value(v));
	text = numeric_text(v);
	errno = 0;
	x = strtoll(text, &end, 10);
	if (errno != 0 || *end != '\0')
		bad_value(d, show_value(v));
	return (int64) x;
}

/*
 * A number option: read from the number's text, so a value beyond double
 * (1e400) is refused here, naming the option, rather than by the numeric
 * cast; then the bounds of the table.
 */
static double
number_value(const AffOptionDef *d, JsonbValue *v)
{
	char	   *text;
	char	   *end;
	double		x;
	AffError	err;

	if (v->type != jbvNumeric)
		bad_value(d, show_value(v));
	text = numeric_text(v);
	errno = 0;
	x = strtod(text, &end);
	/* ERANGE with a tiny result is underflow: the bounds decide about it */
	if (errno == ERANGE && fabs(x) <= DBL_MIN)
		errno = 0;
	if (errno != 0 || *end != '\0' || aff_option_check_number(d, x, &err) != AFF_OK)
		bad_value(d, show_value(v));
	return x;
}

/* A string option, matched against the choices; returns the code (index + 1). */
static int
choice_value(const AffOptionDef *d, JsonbValue *v)
{
	int			i;

	if (v->type == jbvString)
		for (i = 0; i < d->n_choices; i++)
			if (strlen(d->choices[i]) == (size_t) v->val.string.len &&
				strncmp(d->choices[i], v->val.string.val, v->val.string.len) == 0)
				return d->codes ? d->codes[i] : i + 1;
	bad_value(d, show_value(v));
	return -1;					/* not reached */
}

/* Apply one jsonb key and value through the option table. */
static void
set_option(FitOptions *o, const char *key, JsonbValue *v)
{
	bool		deprecated;
	const AffOptionDef *d = aff_option_by_name(key, strlen(key), &deprecated);
	char	   *field;

	if (d == NULL)
	{
		char		names[512];

		aff_option_list(names, sizeof(names));
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("unknown affinity.fit option \"%s\"", key),
				 errhint("Valid options are: %s.", names)));
	}
	if (deprecated)
		ereport(NOTICE,
				(errmsg("affinity.fit option \"%s\" is deprecated", key),
				 errhint("Write \"%s\" instead; it means the same.", d->name)));
	field = (char *) o + d->field;
	switch (d->type)
	{
		case AFF_OPTTYPE_INT:
			{
				int64		x = int64_value(d, v);
				AffError	err;

				if (aff_option_check_number(d, (double) x, &err) != AFF_OK)
					bad_value(d, show_value(v));
				*(int *) field = (int) x;
			}
			break;
		case AFF_OPTTYPE_INT64:
			*(int64 *) field = int64_value(d, v);
			break;
		case AFF_OPTTYPE_REAL:
			*(double *) field = number_value(d, v);
			break;
		case AFF_OPTTYPE_CHOICE:
			*(int *) field = choice_value(d, v);
			break;
		case AFF_OPTTYPE_BOOL:
			if (v->type != jbvBool)
				bad_value(d, show_value(v));
			*(bool *) field = v->val.boolean;
			break;
	}
}

/*
 * The values merged from the GUCs (whose own ranges are wider) must keep
 * the bounds of the option table too.
 */
static void
check_merged(const FitOptions *o)
{
	int			i;

	for (i = 0; i < AFF_OPT_COUNT; i++)
	{
		const AffOptionDef *d = &aff_option_defs[i];
		const char *field = (const char *) o + d->field;
		AffError	err;
		double		x;

		if (d->type == AFF_OPTTYPE_REAL)
			x = *(const double *) field;
		else if (d->type == AFF_OPTTYPE_INT)
			x = *(const int *) field;
		else
			continue;
		/* zero regularization is refused by the method that needs more */
		if (d->id == AFF_OPT_REGULARIZATION && x == 0)
			continue;
		if (aff_option_check_number(d, x, &err) != AFF_OK)
			bad_value(d, psprintf("%g (from the setting affinity.%s)", x, d->name));
	}
}

/*
 * Fill o from options (may be NULL), the GUCs and the built-in defaults.
 * threads comes back resolved to a positive count.
 */
void
fit_options_parse(Jsonb *options, FitOptions *o)
{
	option_owner = "affinity.fit";
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
			affinity_regularization : aff_default_regularization(o->method);
	if (o->regularization <= 0 && o->method == AFF_METHOD_IMPLICIT_ALS)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("implicit_als needs a positive regularization"),
				 errdetail("affinity.regularization is %g.", o->regularization),
				 errhint("Set the option \"regularization\" to a positive number such as 0.1.")));
	check_merged(o);
	o->threads = resolve_threads(o->threads);
}

/*
 * One option of another aggregate (owner names it in messages), applied
 * through the same table: affinity.fit_sequences (sequences.c), after
 * fit_options_parse gave the defaults.
 */
void
fit_option_set(FitOptions *o, const char *key, JsonbValue *v, const char *owner)
{
	option_owner = owner;
	set_option(o, key, v);
	option_owner = "affinity.fit";
}
