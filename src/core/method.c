/*
 * method.c
 *		The table of methods, the table of fit options, and the fit steps
 *		that every method shares (header, guards, progress).
 *
 * Adding a method: write method_<name>.c filling an AffMethod, give it a
 * code in aff_core.h and add it to aff_methods below.  Adding an option:
 * a field in AffOptions (and in the model header if the model keeps it),
 * an entry in aff_option_defs, and its bit in the masks of the methods
 * that use it.
 */
#include "method.h"
#include "als.h"
#include "sequences.h"

#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <string.h>

const AffMethod *const aff_methods[] = {
	&aff_method_implicit_als,
	&aff_method_popularity,
	&aff_method_ease,
	&aff_method_item_knn,
	&aff_method_item_profiles,
	&aff_method_content,
	&aff_method_sequential_rules,
};
const int	aff_n_methods = (int) (sizeof(aff_methods) / sizeof(aff_methods[0]));

/* The method stored under code, or NULL for an unknown code. */
const AffMethod *
aff_method_by_code(int code)
{
	int			i;

	for (i = 0; i < aff_n_methods; i++)
		if (aff_methods[i]->code == code)
			return aff_methods[i];
	return NULL;
}

/* The method named name[0 .. len), or NULL. */
const AffMethod *
aff_method_by_name(const char *name, size_t len)
{
	int			i;

	for (i = 0; i < aff_n_methods; i++)
		if (strlen(aff_methods[i]->name) == len &&
			memcmp(aff_methods[i]->name, name, len) == 0)
			return aff_methods[i];
	return NULL;
}

const char *
aff_method_name(int method)
{
	const AffMethod *m = aff_method_by_code(method);

	return m ? m->name : "unknown";
}

/* Built-in L2 penalty of each method (documented in the README). */
double
aff_default_regularization(int method)
{
	if (method == AFF_METHOD_CONTENT)
		return 1.0;
	return method == AFF_METHOD_EASE ? 500.0 : 30.0;
}

/* item_profiles (code 5) is built by its own aggregate, not chosen in a fit */
static const char *const method_choices[] = {"implicit_als", "popularity", "ease", "item_knn",
"content"};
static const int method_codes[] = {AFF_METHOD_IMPLICIT_ALS, AFF_METHOD_POPULARITY,
AFF_METHOD_EASE, AFF_METHOD_ITEM_KNN, AFF_METHOD_CONTENT};
static const char *const solver_choices[] = {"cg", "cholesky"};
static const char *const confidence_choices[] = {"linear", "log"};
static const char *const normalization_choices[] = {"none", "l2", "tfidf"};

#define OPT(f) offsetof(AffOptions, f)
#define HDR(f) offsetof(AffModelHeader, f)
#define INT_MAX_D 2147483647.0

/*
 * The options, in the order the error hint lists them.  Bounds are
 * inclusive unless lo_open; a real must also be finite.  The choice index
 * + 1 is the code stored (method, solver, confidence codes start at 1).
 */
const AffOptionDef aff_option_defs[AFF_OPT_COUNT] = {
	{AFF_OPT_METHOD, "method", NULL, AFF_OPTTYPE_CHOICE, 0, 0, false,
	method_choices, 5, OPT(method), AFF_NO_FIELD, method_codes},
	{AFF_OPT_FACTORS, "factors", NULL, AFF_OPTTYPE_INT, 1, AFF_MAX_FACTORS, false,
	NULL, 0, OPT(factors), HDR(factors)},
	{AFF_OPT_ITERATIONS, "iterations", NULL, AFF_OPTTYPE_INT, 1, 10000, false,
	NULL, 0, OPT(iterations), HDR(iterations)},
	{AFF_OPT_REGULARIZATION, "regularization", NULL, AFF_OPTTYPE_REAL, 0, 1e8, true,
	NULL, 0, OPT(regularization), HDR(regularization)},
	{AFF_OPT_ALPHA, "alpha", NULL, AFF_OPTTYPE_REAL, 0, 1e6, false,
	NULL, 0, OPT(alpha), HDR(alpha)},
	{AFF_OPT_CONFIDENCE, "confidence", NULL, AFF_OPTTYPE_CHOICE, 0, 0, false,
	confidence_choices, 2, OPT(confidence), HDR(confidence)},
	{AFF_OPT_EPSILON, "epsilon", NULL, AFF_OPTTYPE_REAL, 1e-6, 1e6, false,
	NULL, 0, OPT(epsilon), HDR(epsilon)},
	{AFF_OPT_SOLVER, "solver", NULL, AFF_OPTTYPE_CHOICE, 0, 0, false,
	solver_choices, 2, OPT(solver), HDR(solver)},
	{AFF_OPT_SOLVER_STEPS, "solver_steps", "cg_steps", AFF_OPTTYPE_INT, 1, 1000, false,
	NULL, 0, OPT(solver_steps), HDR(solver_steps)},
	{AFF_OPT_SEED, "seed", NULL, AFF_OPTTYPE_INT64, 0, 0, false,
	NULL, 0, OPT(seed), HDR(seed)},
	{AFF_OPT_THREADS, "threads", NULL, AFF_OPTTYPE_INT, 0, 1024, false,
	NULL, 0, OPT(threads), HDR(threads)},
	{AFF_OPT_MIN_USER, "min_user_interactions", NULL, AFF_OPTTYPE_INT, 1, INT_MAX_D, false,
	NULL, 0, OPT(min_user_interactions), HDR(min_user_interactions)},
	{AFF_OPT_MIN_ITEM, "min_item_interactions", NULL, AFF_OPTTYPE_INT, 1, INT_MAX_D, false,
	NULL, 0, OPT(min_item_interactions), HDR(min_item_interactions)},
	{AFF_OPT_NEIGHBORS, "neighbors", NULL, AFF_OPTTYPE_INT, 1, INT_MAX_D, false,
	NULL, 0, OPT(neighbors), HDR(neighbors)},
	{AFF_OPT_MAX_ITEMS, "max_items", NULL, AFF_OPTTYPE_INT, 1, INT_MAX_D, false,
	NULL, 0, OPT(max_items), HDR(max_items)},
	{AFF_OPT_VERBOSE, "verbose", NULL, AFF_OPTTYPE_BOOL, 0, 0, false,
	NULL, 0, OPT(verbose), AFF_NO_FIELD},
	/* item_profiles: kept in its profile_info section, not in the header */
	{AFF_OPT_NORMALIZATION, "normalization", NULL, AFF_OPTTYPE_CHOICE, 0, 0, false,
	normalization_choices, 3, OPT(normalization), AFF_NO_FIELD},
	{AFF_OPT_MIN_DF, "min_document_frequency", NULL, AFF_OPTTYPE_INT, 1, INT_MAX_D, false,
	NULL, 0, OPT(min_document_frequency), AFF_NO_FIELD},
	/* sequential_rules: kept in its sequence_info section, not in the header */
	{AFF_OPT_WINDOW, "window", NULL, AFF_OPTTYPE_INT, 1, AFF_MAX_WINDOW, false,
	NULL, 0, OPT(window), AFF_NO_FIELD},
	{AFF_OPT_SUCCESSORS, "successors", NULL, AFF_OPTTYPE_INT, 1, AFF_MAX_SUCCESSORS, false,
	NULL, 0, OPT(successors), AFF_NO_FIELD},
};

/*
 * The option named name[0 .. len) (or by its deprecated alias, then
 * *deprecated is set), or NULL.
 */
const AffOptionDef *
aff_option_by_name(const char *name, size_t len, bool *deprecated)
{
	int			i;

	*deprecated = false;
	for (i = 0; i < AFF_OPT_COUNT; i++)
	{
		const AffOptionDef *d = &aff_option_defs[i];

		if (strlen(d->name) == len && memcmp(d->name, name, len) == 0)
			return d;
		if (d->old_name && strlen(d->old_name) == len &&
			memcmp(d->old_name, name, len) == 0)
		{
			*deprecated = true;
			return d;
		}
	}
	return NULL;
}

/* What the option takes, as a phrase for a hint ("an integer from 1 to 8"). */
void
aff_option_describe_bounds(const AffOptionDef *d, char *buf, size_t len)
{
	int			i;
	size_t		n;

	switch (d->type)
	{
		case AFF_OPTTYPE_INT:
			snprintf(buf, len, "an integer from %.0f to %.0f", d->lo, d->hi);
			return;
		case AFF_OPTTYPE_INT64:
			snprintf(buf, len, "an integer from %lld to %lld",
					 (long long) INT64_MIN, (long long) INT64_MAX);
			return;
		case AFF_OPTTYPE_REAL:
			snprintf(buf, len, "a number %s %g and at most %g",
					 d->lo_open ? "above" : "of at least", d->lo, d->hi);
			return;
		case AFF_OPTTYPE_BOOL:
			snprintf(buf, len, "true or false");
			return;
		case AFF_OPTTYPE_CHOICE:
			buf[0] = '\0';
			if (d->n_choices > 2)
				snprintf(buf, len, "one of ");
			for (i = 0; i < d->n_choices; i++)
			{
				n = strlen(buf);
				snprintf(buf + n, len - n, "%s\"%s\"",
						 i == 0 ? "" : d->n_choices == 2 ? " or " : ", ",
						 d->choices[i]);
			}
			return;
	}
}

/*
 * A number for option d: finite, within the bounds, and for an integer
 * type a whole number.  AFF_ERR_OPTION when not.
 */
AffStatus
aff_option_check_number(const AffOptionDef *d, double x, AffError *err)
{
	bool		ok = isfinite(x);

	if (ok && (d->type == AFF_OPTTYPE_INT || d->type == AFF_OPTTYPE_REAL))
		ok = (d->lo_open ? x > d->lo : x >= d->lo) && x <= d->hi;
	if (ok && d->type == AFF_OPTTYPE_INT)
		ok = x == floor(x);
	if (ok)
		return AFF_OK;
	return aff_fail(err, AFF_ERR_OPTION, "invalid value for affinity.fit option \"%s\"",
					d->name);
}

/* The option names, comma separated, for the hint of an unknown option. */
void
aff_option_list(char *buf, size_t len)
{
	int			i;
	size_t		n;

	buf[0] = '\0';
	for (i = 0; i < AFF_OPT_COUNT; i++)
	{
		n = strlen(buf);
		snprintf(buf + n, len - n, "%s%s", i ? ", " : "", aff_option_defs[i].name);
	}
}

/*
 * The header of a new model and its common sections: method, key type,
 * counts, every option as used (an option kept in the header but not used
 * by the method is stored as given, except factors and iterations, which
 * are 0 for methods without factors or sweeps), what the build did, and
 * the key dictionaries and training lists.  parts is cleared first.
 */
void
aff_fit_header(AffModelParts *parts, const AffOptions *o, const AffMatrix *m,
			   int key_type)
{
	const AffMethod *meth = aff_method_by_code(o->method);
	AffModelHeader *h = &parts->h;
	int			i;

	AFF_ASSERT(meth != NULL);
	memset(parts, 0, sizeof(*parts));
	h->method = (uint16_t) o->method;
	h->key_type = (uint16_t) key_type;
	h->n_users = m->n_users;
	h->n_items = m->n_items;
	h->nnz = m->nnz;
	for (i = 0; i < AFF_OPT_COUNT; i++)
	{
		const AffOptionDef *d = &aff_option_defs[i];
		const char *src = (const char *) o + d->field;
		char	   *dst;

		if (d->header_field == AFF_NO_FIELD)
			continue;
		dst = (char *) h + d->header_field;
		if (d->type == AFF_OPTTYPE_REAL)
			memcpy(dst, src, sizeof(double));
		else if (d->type == AFF_OPTTYPE_INT64)
			memcpy(dst, src, sizeof(int64_t));
		else
		{
			int32_t		x = *(const int *) src;

			memcpy(dst, &x, sizeof(int32_t));
		}
	}
	if (!meth->has_factors)
		h->factors = 0;
	if (!meth->has_sweeps)
		h->iterations = 0;
	h->duplicates_summed = m->duplicates_summed;
	h->dropped_users = m->dropped_users;
	h->dropped_items = m->dropped_items;
	h->dropped_interactions = m->dropped_interactions;

	parts->data[AFF_SEC_USER_KEYS] = m->user_keys;
	parts->count[AFF_SEC_USER_KEYS] = m->n_users;
	parts->data[AFF_SEC_ITEM_KEYS] = m->item_keys;
	parts->count[AFF_SEC_ITEM_KEYS] = m->n_items;
	parts->data[AFF_SEC_SEEN_PTR] = m->row_ptr;
	parts->count[AFF_SEC_SEEN_PTR] = m->n_users + 1;
	parts->data[AFF_SEC_SEEN_ITEMS] = m->row_idx;
	parts->count[AFF_SEC_SEEN_ITEMS] = m->nnz;
	parts->data[AFF_SEC_SEEN_WEIGHTS] = m->row_val;
	parts->count[AFF_SEC_SEEN_WEIGHTS] = m->nnz;
}

/* Run the method's fit: parts holds the header and common sections. */
AffStatus
aff_fit_run(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
			AffModelParts *parts, AffError *err)
{
	const AffMethod *meth = aff_method_by_code(o->method);

	if (meth == NULL)
		return aff_fail(err, AFF_ERR_OPTION, "unknown method code %d", o->method);
	AFF_ASSERT(o->threads >= 1);
	if (meth->fit == NULL)
		return aff_fail(err, AFF_ERR_OPTION, "method \"%s\" is not fitted from purchases",
						meth->name);
	AFF_ASSERT(m->n_users >= 1 && m->n_items >= 1);
	return meth->fit(m, o, cx, parts, err);
}

/* Report progress; nonzero: the caller must stop with AFF_ERR_CANCELLED. */
int
aff_fit_progress(const AffFitContext *cx, const char *title, const char *notice)
{
	if (cx->progress != NULL)
		return cx->progress(cx->progress_arg, title, notice);
	if (cx->poll != NULL)
		return cx->poll(cx->poll_arg);
	return 0;
}

/* Bytes of the sparse matrix both ways with its key dictionaries. */
double
aff_sparse_matrix_bytes(const AffMatrix *m)
{
	return 2.0 * m->nnz * (sizeof(int32_t) + sizeof(float)) +
		2.0 * (m->n_users + m->n_items + 1) * sizeof(int64_t);
}

/*
 * The one memory guard of a fit: refuse it when need->bytes passes limit
 * (bytes; 0 or less: no limit), limit_name being what sets the limit.  The
 * aggregate calls it as rows arrive and before the method runs, the methods
 * (through aff_fit_check_memory) before their own work memory; all refusals
 * have this message, with the step's figures in the detail.
 */
AffStatus
aff_fit_memory_guard(double limit, const char *limit_name,
					 const AffFitMemory *need, AffError *err)
{
	const double mb = 1024.0 * 1024.0;
	const char *name = limit_name ? limit_name : "the memory limit";
	char		texts[160];

	if (limit <= 0 || need->bytes <= limit)
		return AFF_OK;
	texts[0] = '\0';
	if (need->text_keys > 0)
		snprintf(texts, sizeof(texts),
				 ", and %lld distinct text keys of %.1f MB (%.1f MB with their dictionaries)",
				 (long long) need->text_keys, need->text_bytes / mb,
				 need->text_held_bytes / mb);
	aff_fail(err, AFF_ERR_LIMIT, "affinity.fit would need about %.0f MB, over %s",
			 need->bytes / mb, name);
	aff_detail(err, "%s: %.0f interactions of %s%.0f users and %.0f items%s; %s is %.0f MB.",
			   need->step, need->interactions, need->at_most ? "at most " : "",
			   need->users, need->items, texts, name, limit / mb);
	return aff_hint(err, "Raise %s, %s.", name,
					need->remedy ? need->remedy : "or fit on fewer rows");
}

/* A method's guard of its work memory need (bytes) over m, by the context's limit. */
AffStatus
aff_fit_check_memory(const AffFitContext *cx, const char *method, double need,
					 const AffMatrix *m, AffError *err)
{
	AffFitMemory fm;
	char		step[64];

	memset(&fm, 0, sizeof(fm));
	snprintf(step, sizeof(step), "Method \"%s\"", method);
	fm.bytes = need;
	fm.step = step;
	fm.interactions = (double) m->nnz;
	fm.users = (double) m->n_users;
	fm.items = (double) m->n_items;
	fm.remedy = "or drop rare items with min_item_interactions";
	return aff_fit_memory_guard(cx->memory_limit, cx->memory_limit_name, &fm, err);
}

/* Largest confidence a fit accepts: beyond it the float solves lose all precision. */
#define AFF_MAX_CONFIDENCE 1e12

/*
 * Every interaction's confidence c = 1 + alpha f(w), computed in double,
 * must be finite and at most AFF_MAX_CONFIDENCE; the first that is not is
 * named with its user and item keys, weight and confidence.
 */
AffStatus
aff_check_confidences(const AffMatrix *m, const AffOptions *o, AffError *err)
{
	int64_t		u;
	int64_t		j;

	for (u = 0; u < m->n_users; u++)
		for (j = m->row_ptr[u]; j < m->row_ptr[u + 1]; j++)
		{
			double		c = aff_confidence(o->confidence, o->alpha, o->epsilon,
										   m->row_val[j]);

			if (isfinite(c) && c <= AFF_MAX_CONFIDENCE)
				continue;
			aff_fail(err, AFF_ERR_NUMERIC, "the confidence of an interaction is too large");
			aff_detail(err, "User %lld, item %lld has weight %g, which gives confidence %g with alpha %g and %s confidence; at most %g is usable.",
					   (long long) m->user_keys[u], (long long) m->item_keys[m->row_idx[j]],
					   (double) m->row_val[j], c, o->alpha,
					   o->confidence == AFF_CONFIDENCE_LINEAR ? "linear" : "log",
					   AFF_MAX_CONFIDENCE);
			return aff_hint(err, "Use \"confidence\": \"log\", a smaller alpha, or scale the weights down.");
		}
	return AFF_OK;
}
