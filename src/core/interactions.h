/*
 * interactions.h
 *		From collected (user, item, weight) rows to key dictionaries and a
 *		sparse matrix stored both ways (CSR by user and by item).
 */
#ifndef AFF_INTERACTIONS_H
#define AFF_INTERACTIONS_H

#include "aff_core.h"

/* One input row as the aggregate collects it. */
typedef struct AffTriple
{
	int64_t		user;
	int64_t		item;
	float		weight;
	int32_t		pad;			/* always 0: rows are copied as bytes */
} AffTriple;

typedef struct AffMatrix
{
	int64_t		n_users;
	int64_t		n_items;
	int64_t		nnz;
	int64_t    *user_keys;		/* [n_users], strictly ascending */
	int64_t    *item_keys;		/* [n_items], strictly ascending */
	int64_t    *row_ptr;		/* [n_users + 1] */
	int32_t    *row_idx;		/* [nnz] item indices, ascending per row */
	float	   *row_val;		/* [nnz] summed weights */
	int64_t    *col_ptr;		/* [n_items + 1] */
	int32_t    *col_idx;		/* [nnz] user indices, ascending per column */
	float	   *col_val;		/* [nnz] */
	/* what the build did to the input */
	int64_t		duplicates_summed;	/* rows merged into an earlier row */
	int64_t		dropped_users;	/* under min_user_interactions */
	int64_t		dropped_items;	/* under min_item_interactions */
	int64_t		dropped_interactions;
} AffMatrix;

/* What the build is asked to do, and how it is stopped. */
typedef struct AffBuildParams
{
	int			min_user;		/* min_user_interactions */
	int			min_item;		/* min_item_interactions */
	uint64_t	index_key[2];	/* random key of the item index's hash */
	AffPollFn	poll;			/* called between chunks; NULL: never stop */
	void	   *poll_arg;
} AffBuildParams;

extern AffStatus aff_matrix_build(AffTriple *rows, int64_t n_rows,
								  const AffBuildParams *p,
								  const AffAllocator *a, AffMatrix *m,
								  AffError *err);
extern void aff_matrix_free(const AffAllocator *a, AffMatrix *m);
extern int64_t aff_find_key(const int64_t *keys, int64_t n, int64_t key);

#endif
