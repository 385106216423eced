/*
 * weights.c
 *		The item-item weight methods in the server: fitting EASE and
 *		item_knn into model sections, and serving scores from them.
 *
 * EASE (Steck 2019, "Embarrassingly Shallow Autoencoders for Sparse Data",
 * WWW 2019) stores a dense items x items matrix B; its cost is cubic in the
 * items and its size quadratic, so the fit refuses, before allocating,
 * catalogues over max_items, models that would not fit in one value, and
 * fits over affinity.max_fit_memory.  item_knn stores, per item, the
 * `neighbors` items whose confidence-weighted columns are closest by
 * cosine, as CSR lists.
 *
 * The engine (core/ease.c, core/knn.c) does the work on worker threads
 * and in blocked BLAS/LAPACK calls; this file checks sizes, hands the
 * engine a poll callback for interrupts, and turns engine errors into
 * ereport.
 *
 * Serving reads the sections through the model view.  A user's score for
 * item j is the sum over the user's training items i of the weight of the
 * pair (i, j), with the user's row taken as binary, as in the EASE paper.
 */
#include "weights.h"

#include "miscadmin.h"
#include "portability/instr_time.h"
#include "utils/memutils.h"

#include "../core/ease.h"
#include "../core/knn.h"

static double
megabytes(double bytes)
{
	return bytes / (1024.0 * 1024.0);
}

/*
 * Size of the model that parts will encode once section `kind` holds
 * `count` elements, so that an oversized model is refused before the fit
 * instead of after it.  Returns 0 when the size overflows.
 */
static uint64
model_size_with(const AffModelParts *parts, int kind, uint64 count)
{
	AffModelParts tmp = *parts;
	AffError	err;
	uint64		size;

	/* only NULL-ness of data matters to the size */
	tmp.data[kind] = parts->data[AFF_SEC_ITEM_KEYS];
	tmp.count[kind] = count;
	if (aff_model_size(&tmp, &size, &err) != AFF_OK)
		return 0;
	return size;
}

/* Bytes of the sparse matrix both ways with its key dictionaries. */
static double
sparse_matrix_bytes(const AffMatrix *m)
{
	return 2.0 * m->nnz * (sizeof(int32) + sizeof(float)) +
		2.0 * (m->n_users + m->n_items + 1) * sizeof(int64);
}

/* Refuse a fit whose work memory would pass affinity.max_fit_memory. */
static void
check_fit_memory(const char *method, double need, const AffMatrix *m)
{
	double		limit = (double) affinity_max_fit_memory_mb * 1024.0 * 1024.0;

	if (need > limit)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("affinity.fit would need about %.0f MB, over affinity.max_fit_memory",
						megabytes(need)),
				 errdetail("Method \"%s\" over " INT64_FORMAT " items and " INT64_FORMAT " interactions; affinity.max_fit_memory is %d MB.",
						   method, m->n_items, m->nnz, affinity_max_fit_memory_mb),
				 errhint("Raise affinity.max_fit_memory, or drop rare items with min_item_interactions.")));
}

/*
 * The EASE guards, all before anything large is allocated: a positive
 * regularization, max_items, the size of one value (1 GB),
 * affinity.max_fit_memory.  Memory peaks at one of three moments: the
 * double Gram matrix beside the float weights (12 bytes per item pair),
 * the weights beside the encoded model, or the model beside the copy that
 * the executor makes of an aggregate's result; the sparse matrix (CSR both
 * ways, dictionaries) is alive throughout.
 */
static void
check_ease_size(const AffMatrix *m, const FitOptions *o,
				const AffModelParts *parts)
{
	int64		n = m->n_items;
	uint64		size;
	size_t		work;
	double		need;

	/* X^T X alone is singular as soon as two items have the same buyers */
	if (!(o->regularization > 0))
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("ease needs a positive regularization"),
				 errdetail("The regularization is %g.", o->regularization),
				 errhint("Set the option \"regularization\" to a positive number; ease defaults to %g.",
						 method_default_regularization(AFF_METHOD_EASE))));
	if (n > o->max_items)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("too many items for an ease fit"),
				 errdetail("The training data holds " INT64_FORMAT " items; max_items is %d.",
						   n, o->max_items),
				 errhint("Drop rare items with min_item_interactions, raise max_items (the fit takes time cubic in the items), or use method \"item_knn\".")));
	size = model_size_with(parts, AFF_SEC_ITEM_WEIGHTS, (uint64) n * (uint64) n);
	if (size == 0 || size > MaxAllocSize)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("an ease model over " INT64_FORMAT " items is too large for one value", n),
				 errdetail("Its item weights take %.0f MB; a value holds at most 1 GB.",
						   megabytes(4.0 * n * n)),
				 errhint("Drop rare items with min_item_interactions, or use method \"item_knn\".")));
	work = aff_ease_work_bytes(n);
	if (work == 0)
		elog(ERROR, "ease work size overflows for " INT64_FORMAT " items", n);
	need = Max((double) work, 4.0 * n * n + (double) size);
	need = Max(need, 2.0 * (double) size);
	check_fit_memory("ease", need + sparse_matrix_bytes(m), m);
}

/* A numerical failure (a tiny regularization can cause one), with a hint. */
static void
ease_check_numeric(AffStatus rc, const AffError *err, const FitOptions *o)
{
	if (rc != AFF_ERR_NUMERIC)
		engine_check(rc, err);
	ereport(ERROR,
			(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
			 errmsg("%s", err->msg),
			 errdetail("%s", err->detail),
			 errhint("Use a larger regularization (now %g); ease defaults to %g.",
					 o->regularization, method_default_regularization(AFF_METHOD_EASE))));
}

static void
ease_notice(const FitOptions *o, const char *step, int64 n, double secs)
{
	if (o->verbose)
		ereport(NOTICE,
				(errmsg("affinity.fit ease: %s of " INT64_FORMAT " items, %.3f s",
						step, n, secs)));
}

/*
 * Fit EASE: B = I - P diag(1 / diag P) with P = (X^T X + lambda I)^-1,
 * zero diagonal, stored as n_items^2 floats, row-major, in
 * AFF_SEC_ITEM_WEIGHTS.
 */
void
fit_ease(const AffMatrix *m, const FitOptions *o, const AffAllocator *a,
		 AffModelParts *parts)
{
	int64		n = m->n_items;
	size_t		cells = (size_t) n * (size_t) n;
	double	   *G;
	float	   *B;
	AffError	err;
	AffStatus	rc;
	instr_time	t0;

	check_ease_size(m, o, parts);
	G = aff_alloc_array(a, cells, sizeof(double));
	B = aff_alloc_array(a, cells, sizeof(float));
	if (G == NULL || B == NULL)
		ereport(ERROR,
				(errcode(ERRCODE_OUT_OF_MEMORY),
				 errmsg("out of memory for an ease fit over " INT64_FORMAT " items", n),
				 errdetail("The fit needs %.0f MB for its two item x item matrices.",
						   megabytes((double) aff_ease_work_bytes(n)))));

	CHECK_FOR_INTERRUPTS();
	INSTR_TIME_SET_CURRENT(t0);
	rc = aff_ease_gram(m, o->regularization, o->threads, G, engine_poll, NULL, &err);
	engine_check(rc, &err);
	ease_notice(o, "Gram matrix", n, seconds_since(t0));

	/* BLAS calls cannot be interrupted; the inverse polls between blocks */
	CHECK_FOR_INTERRUPTS();
	INSTR_TIME_SET_CURRENT(t0);
	rc = aff_ease_invert(G, n, o->threads, o->regularization, engine_poll,
						 NULL, &err);
	if (rc != AFF_OK)
		ease_check_numeric(rc, &err, o);
	ease_notice(o, "inverse", n, seconds_since(t0));
	CHECK_FOR_INTERRUPTS();

	INSTR_TIME_SET_CURRENT(t0);
	rc = aff_ease_weights(G, n, o->threads, B, engine_poll, NULL, &err);
	if (rc != AFF_OK)
		ease_check_numeric(rc, &err, o);
	aff_release(a, G);
	ease_notice(o, "weights", n, seconds_since(t0));
	parts->data[AFF_SEC_ITEM_WEIGHTS] = B;
	parts->count[AFF_SEC_ITEM_WEIGHTS] = cells;
}

/*
 * Fit item_knn: the top `neighbors` cosine neighbours of each item's
 * confidence-weighted column, as CSR in the AFF_SEC_NEIGHBOR_* sections.
 */
void
fit_item_knn(const AffMatrix *m, const FitOptions *o, const AffAllocator *a,
			 AffModelParts *parts)
{
	AffKnnParams p;
	AffNeighbors nb;
	AffError	err;
	size_t		work;
	uint64		size;
	instr_time	t0;

	p.neighbors = o->neighbors;
	p.confidence = o->confidence;
	p.alpha = o->alpha;
	p.epsilon = o->epsilon;
	p.threads = o->threads;
	work = aff_item_knn_work_bytes(m, &p);
	if (work == 0)
		elog(ERROR, "item_knn work size overflows for " INT64_FORMAT " items", m->n_items);
	check_fit_memory("item_knn", (double) work + sparse_matrix_bytes(m), m);

	CHECK_FOR_INTERRUPTS();
	INSTR_TIME_SET_CURRENT(t0);
	engine_check(aff_item_knn(m, &p, a, &nb, engine_poll, NULL, &err), &err);
	if (o->verbose)
		ereport(NOTICE,
				(errmsg("affinity.fit item_knn: " INT64_FORMAT " neighbours of " INT64_FORMAT " items, %.3f s",
						nb.count, m->n_items, seconds_since(t0))));

	parts->data[AFF_SEC_NEIGHBOR_PTR] = nb.ptr;
	parts->count[AFF_SEC_NEIGHBOR_PTR] = m->n_items + 1;
	parts->data[AFF_SEC_NEIGHBOR_IDX] = nb.idx;
	parts->count[AFF_SEC_NEIGHBOR_IDX] = nb.count;
	parts->data[AFF_SEC_NEIGHBOR_SIM] = nb.sim;
	parts->count[AFF_SEC_NEIGHBOR_SIM] = nb.count;
	if (aff_model_size(parts, &size, &err) != AFF_OK || size > MaxAllocSize)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("an item_knn model with " INT64_FORMAT " neighbours is too large for one value",
						nb.count),
				 errdetail("A value holds at most 1 GB."),
				 errhint("Lower neighbors (now %d), or drop rare items with min_item_interactions.",
						 o->neighbors)));
}

/* Serving below: the method's sections must be there (the view checked). */
static void
require_weights(const AffModelView *v)
{
	if (v->h->method == AFF_METHOD_EASE ? v->item_weights == NULL :
		v->h->method != AFF_METHOD_ITEM_KNN || v->neighbor_ptr == NULL)
		elog(ERROR, "item-item weights requested from a model of method \"%s\"",
			 aff_method_name(v->h->method));
}

void
weights_scores(const AffModelView *v, const int32 *items, const float *weights,
			   int64 n, float *scores)
{
	int64		n_items = v->h->n_items;
	int64		t;
	int64		j;

	(void) weights;				/* binary rows, as in the EASE paper */
	require_weights(v);
	memset(scores, 0, sizeof(float) * n_items);
	for (t = 0; t < n; t++)
	{
		int32		i = items[t];

		if (v->h->method == AFF_METHOD_EASE)
		{
			const float *row = v->item_weights + (size_t) i * n_items;

			for (j = 0; j < n_items; j++)
				scores[j] += row[j];
		}
		else
			for (j = v->neighbor_ptr[i]; j < v->neighbor_ptr[i + 1]; j++)
				scores[v->neighbor_idx[j]] += v->neighbor_sim[j];
	}
}

void
weights_item_row(const AffModelView *v, int64 it, float *sims)
{
	int64		n_items = v->h->n_items;
	int64		j;

	require_weights(v);
	if (v->h->method == AFF_METHOD_EASE)
	{
		memcpy(sims, v->item_weights + (size_t) it * n_items, sizeof(float) * n_items);
		return;
	}
	memset(sims, 0, sizeof(float) * n_items);
	for (j = v->neighbor_ptr[it]; j < v->neighbor_ptr[it + 1]; j++)
		sims[v->neighbor_idx[j]] = v->neighbor_sim[j];
}

void
weights_item_skip(const AffModelView *v, int64 it, uint8 *skip)
{
	int64		j;

	require_weights(v);
	if (v->h->method == AFF_METHOD_ITEM_KNN)
	{
		uint8	   *keep = palloc0(v->h->n_items);

		for (j = v->neighbor_ptr[it]; j < v->neighbor_ptr[it + 1]; j++)
			keep[v->neighbor_idx[j]] = 1;
		for (j = 0; j < v->h->n_items; j++)
			skip[j] |= !keep[j];
		pfree(keep);
	}
	skip[it] = 1;
}

float
weights_pair(const AffModelView *v, int32 i, int32 j)
{
	int64		k;

	require_weights(v);
	if (v->h->method == AFF_METHOD_EASE)
		return v->item_weights[(size_t) i * v->h->n_items + j];
	/* lists are short (at most neighbors) and ordered by similarity */
	for (k = v->neighbor_ptr[i]; k < v->neighbor_ptr[i + 1]; k++)
		if (v->neighbor_idx[k] == j)
			return v->neighbor_sim[k];
	return 0.0f;
}
