/*
 * content.c
 *		The item profiles given to affinity.fit (its fifth argument) for
 *		method content (core/method_content.c): checked when the first row
 *		arrives, kept in the fit's state, and laid onto the fitted rows in
 *		the final step.
 *
 * The profiles come as a scalar subquery, which PostgreSQL evaluates once
 * (an InitPlan) and passes to every row's transition call; the state keeps
 * one copy.  The model takes the profiles' catalogue and their text hash
 * key: the fit's text keys are hashed again under that key before the
 * matrix is built (fit_agg.c), so the profiles' item and feature keys are
 * used as they are.
 */
#include "affinity_pg.h"

#include "catalog/pg_type.h"
#include "miscadmin.h"
#include "utils/memutils.h"

#include "../core/profiles.h"

/* The profiles' view (they passed full validation on their way in). */
static void
profiles_view(bytea *profiles, AffModelView *pv)
{
	AffError	err;

	if (aff_model_view((const uint8_t *) profiles, VARSIZE(profiles), pv, &err) != AFF_OK)
		raise_engine_error(&err);
}

/*
 * The profiles argument argno of a fit's first row, copied into cxt, after
 * the checks: not NULL, a value of method item_profiles, the fit's method
 * content, the item keys of the profiles' type.
 */
bytea *
fit_profiles_arg(FunctionCallInfo fcinfo, int argno, const FitOptions *o, MemoryContext cxt)
{
	MemoryContext old;
	bytea	   *p;
	AffModelView pv;
	bool		fit_text;
	bool		prof_text;

	if (PG_ARGISNULL(argno))
		ereport(ERROR,
				(errcode(ERRCODE_NULL_VALUE_NOT_ALLOWED),
				 errmsg("the item profiles given to affinity.fit are NULL"),
				 errdetail("The fifth argument of affinity.fit is NULL."),
				 errhint("Pass a value of affinity.item_profiles, for example (SELECT affinity.item_profiles(item_id, word, 1) FROM catalogue_words); a subquery that finds no row gives NULL.")));
	old = MemoryContextSwitchTo(cxt);
	p = DatumGetByteaPCopy(PG_GETARG_DATUM(argno));
	MemoryContextSwitchTo(old);
	profiles_view(p, &pv);
	if (pv.h->method != AFF_METHOD_ITEM_PROFILES)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("the fifth argument of affinity.fit must be item profiles"),
				 errdetail("It is a model of method \"%s\" with " INT64_FORMAT " users and " INT64_FORMAT " items.",
						   aff_method_name(pv.h->method), pv.h->n_users, pv.h->n_items),
				 errhint("Build it with affinity.item_profiles(item_id, feature, value) or affinity.item_profiles(item_id, vector).")));
	if (o->method != AFF_METHOD_CONTENT)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("method \"%s\" does not use item profiles", aff_method_name(o->method)),
				 errdetail("affinity.fit was given item profiles of " INT64_FORMAT " items.",
						   pv.h->n_items),
				 errhint("Set \"method\": \"content\" in the options, or leave the profiles out.")));
	fit_text = get_fn_expr_argtype(fcinfo->flinfo, 2) == TEXTOID;
	prof_text = aff_keys_side_text(pv.h->key_type, false);
	if (fit_text != prof_text)
		ereport(ERROR,
				(errcode(ERRCODE_DATATYPE_MISMATCH),
				 errmsg("the item keys of the purchases and of the item profiles differ in type"),
				 errdetail("The purchases' item keys are %s; the profiles' are %s.",
						   fit_text ? "text" : "bigint", prof_text ? "text" : "bigint"),
				 errhint("Build the profiles over item keys of the purchases' type, or cast the purchases' item_id (item_id::%s).",
						 prof_text ? "text" : "bigint")));
	return p;
}

/* A fit of method content without profiles (the 3- and 4-argument forms). */
void
fit_profiles_missing(const FitOptions *o)
{
	if (o->method == AFF_METHOD_CONTENT)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("method \"content\" needs item profiles"),
				 errhint("Pass them as the fifth argument: affinity.fit(user_id, item_id, weight, options, (SELECT affinity.item_profiles(item_id, feature, value) FROM ...)).")));
}

/* The profiles' text hash key, under which the fit keys its texts. */
void
fit_profiles_hash_key(bytea *profiles, uint64 key[2])
{
	AffModelView pv;

	profiles_view(profiles, &pv);
	key[0] = pv.h->text_hash_key[0];
	key[1] = pv.h->text_hash_key[1];
}

/*
 * The fitted rows m laid onto the profiles' catalogue (engine
 * aff_content_attach); parts takes the profiles' sections.
 */
void
fit_profiles_attach(bytea *profiles, AffMatrix *m, AffModelParts *parts,
					const AffAllocator *a)
{
	AffModelView pv;
	AffError	err;

	profiles_view(profiles, &pv);
	CHECK_FOR_INTERRUPTS();
	if (aff_content_attach(m, &pv, parts, a, &err) != AFF_OK)
		raise_engine_error(&err);
}
