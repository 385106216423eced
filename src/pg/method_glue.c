/*
 * method_glue.c
 *		Calling the engine's methods from the server: the fit with its
 *		progress callback and limits, engine errors as ereport (with hint),
 *		the serving context of a cached model, and the options part of
 *		describe().
 *
 * Nothing here knows a method by name: everything goes through the table
 * of core/method.h.
 */
#include "affinity_pg.h"

#include "miscadmin.h"
#include "utils/float.h"
#include "utils/memutils.h"
#include "utils/ps_status.h"

/*
 * Raise the engine's error: a cancellation as the pending interrupt, else
 * with its SQLSTATE, detail and hint (engine_check, model_io.c).
 */
void
raise_engine_error(const AffError *err)
{
	engine_check(err->status, err);
	elog(ERROR, "engine error without a status");
}

/*
 * The fit's progress callback, on the backend thread between phases: the
 * process title, a NOTICE for verbose fits, and whether to stop.  It does
 * not check for interrupts itself (that would longjmp through engine
 * frames): the engine stops and returns, then raise_engine_error does.
 */
static int
fit_progress(void *arg, const char *title, const char *notice)
{
	(void) arg;
	if (title != NULL)
		set_ps_display(title);
	if (notice != NULL)
		ereport(NOTICE, (errmsg("%s", notice)));
	return QueryCancelPending || ProcDiePending;
}

/*
 * Run the method of o over m into parts (header and common sections
 * filled), allocating through a (the fit's metered allocator on its work
 * context); errors are raised.
 */
void
method_fit(const AffMatrix *m, const FitOptions *o, const AffAllocator *a,
		   AffModelParts *parts)
{
	AffFitContext cx;
	AffError	err;

	memset(&cx, 0, sizeof(cx));
	cx.alloc = a;
	cx.poll = engine_poll;
	cx.progress = fit_progress;
	cx.memory_limit = (double) affinity_max_fit_memory_mb * 1024.0 * 1024.0;
	cx.memory_limit_name = "affinity.max_fit_memory";
	cx.max_model_bytes = AFF_MAX_MODEL_BYTES;
	CHECK_FOR_INTERRUPTS();
	if (aff_fit_run(m, o, &cx, parts, &err) != AFF_OK)
		raise_engine_error(&err);
}

/* The method of a model that passed the structural view. */
const AffMethod *
model_method(const AffModelView *v)
{
	const AffMethod *meth = aff_method_by_code(v->h->method);

	if (meth == NULL)
		elog(ERROR, "affinity.model of unknown method code %d", (int) v->h->method);
	return meth;
}

/*
 * The serving context of a cached model: the view, the derived data that
 * the call needs (SERVE_* bits) and its method has (from
 * the cache, computed on first use), and allocator a
 * (in the current memory context) for per-call scratch.
 */
void
serve_context(CachedModel *e, AffServe *s, AffAllocator *a, int needs)
{
	const AffMethod *meth = model_method(&e->view);

	*a = context_allocator(CurrentMemoryContext);
	memset(s, 0, sizeof(*s));
	s->v = &e->view;
	s->alloc = a;
	if ((needs & SERVE_GRAM) && meth->needs_gram)
		s->gram = cached_gram(e);
	if ((needs & SERVE_ITEM_NORMS) && meth->has_factors)
		s->item_norms = cached_norms(e, false);
	if ((needs & SERVE_USER_NORMS) && meth->user_vectors)
		s->user_norms = cached_norms(e, true);
}

/*
 * ", "options": {...}" for describe(): the options that the model's method
 * uses, as its header keeps them, named as the option table names them.
 */
void
describe_options(StringInfo s, const AffModelHeader *h)
{
	const AffMethod *meth = aff_method_by_code(h->method);
	uint32		mask = meth ? meth->options :
		AFF_OPT_BIT(AFF_OPT_MIN_USER) | AFF_OPT_BIT(AFF_OPT_MIN_ITEM);
	bool		first = true;
	int			i;

	appendStringInfoString(s, ", \"options\": {");
	for (i = 0; i < AFF_OPT_COUNT; i++)
	{
		const AffOptionDef *d = &aff_option_defs[i];
		const char *src;
		int32		iv;
		int64		lv;
		double		dv;

		if (!(mask & AFF_OPT_BIT(d->id)) || d->header_field == AFF_NO_FIELD)
			continue;
		src = (const char *) h + d->header_field;
		appendStringInfo(s, "%s\"%s\": ", first ? "" : ", ", d->name);
		first = false;
		switch (d->type)
		{
			case AFF_OPTTYPE_REAL:
				memcpy(&dv, src, sizeof(double));
				appendStringInfoString(s, float8out_internal(dv));
				break;
			case AFF_OPTTYPE_INT64:
				memcpy(&lv, src, sizeof(int64));
				appendStringInfo(s, INT64_FORMAT, lv);
				break;
			case AFF_OPTTYPE_CHOICE:
				memcpy(&iv, src, sizeof(int32));
				appendStringInfo(s, "\"%s\"", iv >= 1 && iv <= d->n_choices ?
								 d->choices[iv - 1] : "unknown");
				break;
			default:
				memcpy(&iv, src, sizeof(int32));
				appendStringInfo(s, "%d", iv);
				break;
		}
	}
	appendStringInfoString(s, "}");
}
