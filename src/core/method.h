/*
 * method.h
 *		The methods of affinity as one table of operations, and the fit
 *		options as one table of definitions.
 *
 * A method is one engine file (method_<name>.c) that fills an AffMethod:
 * its code and name, the model sections it writes, the options it uses,
 * its fit, and its serving operations (scores of a known user, scores of a
 * basket, an item-to-item row, the score of one pair, the contributions of
 * a user's training items).  The PostgreSQL binding finds the method of a
 * model with aff_method_by_code and calls through the table; it holds no
 * per-method arithmetic.  The model format (section rules), describe() and
 * option parsing read the same table.
 *
 * Serving operations run on plain memory and never allocate unless given an
 * allocator; user_scores may run on worker threads (the batch), so it must
 * not allocate or fail.
 */
#ifndef AFF_METHOD_H
#define AFF_METHOD_H

#include <stdbool.h>

#include "aff_core.h"
#include "interactions.h"
#include "model_format.h"

/* Option identities; the bit of option x in a mask is AFF_OPT_BIT(x). */
typedef enum AffOptionId
{
	AFF_OPT_METHOD = 0,
	AFF_OPT_FACTORS,
	AFF_OPT_ITERATIONS,
	AFF_OPT_REGULARIZATION,
	AFF_OPT_ALPHA,
	AFF_OPT_CONFIDENCE,
	AFF_OPT_EPSILON,
	AFF_OPT_SOLVER,
	AFF_OPT_SOLVER_STEPS,
	AFF_OPT_SEED,
	AFF_OPT_THREADS,
	AFF_OPT_MIN_USER,
	AFF_OPT_MIN_ITEM,
	AFF_OPT_NEIGHBORS,
	AFF_OPT_MAX_ITEMS,
	AFF_OPT_VERBOSE,
	AFF_OPT_NORMALIZATION,		/* item_profiles */
	AFF_OPT_MIN_DF,
	AFF_OPT_WINDOW,				/* sequential_rules */
	AFF_OPT_SUCCESSORS,
	AFF_OPT_COUNT
} AffOptionId;

#define AFF_OPT_BIT(id)		(1u << (id))

/* Options a fit runs with (the binding merges jsonb, GUCs, defaults). */
typedef struct AffOptions
{
	int			method;			/* AFF_METHOD_* */
	int			factors;
	int			iterations;
	int			solver;			/* AFF_SOLVER_* */
	int			solver_steps;	/* conjugate-gradient steps per row and sweep */
	int			confidence;		/* AFF_CONFIDENCE_* */
	int			threads;		/* resolved: >= 1 */
	int			min_user_interactions;
	int			min_item_interactions;
	int			neighbors;
	int			max_items;
	double		regularization;
	double		alpha;
	double		epsilon;
	int64_t		seed;
	bool		verbose;
	int			normalization;	/* item_profiles: AFF_NORM_* (profiles.h) */
	int			min_document_frequency;
	int			window;			/* sequential_rules: steps (sequences.h) */
	int			successors;		/* sequential_rules: kept per item */
} AffOptions;

typedef enum AffOptionType
{
	AFF_OPTTYPE_INT,			/* int field, integer bounds */
	AFF_OPTTYPE_INT64,			/* int64_t field, any int64 */
	AFF_OPTTYPE_REAL,			/* double field, finite, bounds */
	AFF_OPTTYPE_CHOICE,			/* int field: 1 + index of the choice */
	AFF_OPTTYPE_BOOL			/* bool field */
} AffOptionType;

#define AFF_NO_FIELD	((size_t) -1)

/* One option: its name, type, bounds, and where it lives. */
typedef struct AffOptionDef
{
	AffOptionId id;
	const char *name;
	const char *old_name;		/* deprecated alias, or NULL */
	AffOptionType type;
	double		lo;				/* bounds, inclusive unless lo_open */
	double		hi;
	bool		lo_open;
	const char *const *choices; /* AFF_OPTTYPE_CHOICE: n_choices names */
	int			n_choices;
	size_t		field;			/* offsetof in AffOptions */
	size_t		header_field;	/* offsetof in AffModelHeader, or AFF_NO_FIELD */
	const int  *codes;			/* CHOICE: the code of each choice (NULL: index + 1) */
} AffOptionDef;

extern const AffOptionDef aff_option_defs[AFF_OPT_COUNT];
extern const AffOptionDef *aff_option_by_name(const char *name, size_t len,
											  bool *deprecated);
extern AffStatus aff_option_check_number(const AffOptionDef *d, double x,
										 AffError *err);
extern void aff_option_describe_bounds(const AffOptionDef *d, char *buf,
									   size_t len);
extern void aff_option_list(char *buf, size_t len);

/*
 * What a fit is given besides the matrix and the options.  progress is
 * called on the calling thread between phases (never while workers run)
 * with a process-title text and, when the fit is verbose, a notice line;
 * a nonzero result asks the fit to stop (AFF_ERR_CANCELLED).
 */
typedef int (*AffProgressFn) (void *arg, const char *title, const char *notice);

typedef struct AffFitContext
{
	const AffAllocator *alloc;
	AffPollFn	poll;			/* for worker loops */
	void	   *poll_arg;
	AffProgressFn progress;
	void	   *progress_arg;
	double		memory_limit;	/* bytes a fit may use, 0 = no limit */
	const char *memory_limit_name;	/* what sets it, for messages */
	uint64_t	max_model_bytes;	/* largest model value */
} AffFitContext;

/*
 * A model as serving sees it: the view, plus the derived data the method
 * asked for (computed by aff_gram / aff_row_norms, kept by the
 * caller's cache), plus an allocator for per-call scratch (NULL on worker
 * threads, where only user_scores runs).
 */
typedef struct AffServe
{
	const AffModelView *v;
	const double *gram;			/* Y^T Y (f x f), when needs_gram */
	const float *item_norms;	/* |y_i|, when needs_norms */
	const float *user_norms;
	const AffAllocator *alloc;
} AffServe;

typedef struct AffMethod
{
	int			code;			/* AFF_METHOD_* stored in the header */
	const char *name;			/* as the option "method" names it */
	uint32_t	sections;		/* bits (1 << kind) of the sections it writes */
	uint32_t	options;		/* AFF_OPT_BIT of the options it uses */
	bool		has_factors;	/* header factors in 1..AFF_MAX_FACTORS, else 0 */
	bool		has_sweeps;		/* header iterations is kept, else 0 */
	bool		needs_gram;		/* basket scores and contributions need Y^T Y */
	bool		user_vectors;	/* users_like works */
	bool		personal;		/* scores depend on the user (reasons works) */
	/*
	 * A value of item content without users or training pairs (n_users =
	 * nnz = 0): only item_row is served; the binding refuses every other
	 * serving function for it, naming what the value is.
	 */
	bool		catalogue;

	/*
	 * Fit m into the method's sections of parts (the common sections and
	 * the header are filled already).  Errors carry message, detail, hint.
	 */
	AffStatus	(*fit) (const AffMatrix *m, const AffOptions *o,
						const AffFitContext *cx, AffModelParts *parts,
						AffError *err);
	/* scores[0 .. n_items) of known user u; no allocation, no failure */
	void		(*user_scores) (const AffServe *s, int64_t u, float *scores);
	/*
	 * Scores of a block of n users at once into scores (n x n_items), with
	 * work (n x factors floats) as scratch; NULL: user_scores row by row.
	 * Runs on worker threads like user_scores.
	 */
	void		(*block_scores) (const AffServe *s, const int32_t *users,
								 int64_t n, float *work, float *scores);
	/* only scores[cand[j]] for the n candidates (NULL: use user_scores) */
	void		(*candidate_scores) (const AffServe *s, int64_t u,
									 const int32_t *cand, int64_t n,
									 float *scores);
	/* scores of all items for a basket of n ascending item indices */
	AffStatus	(*basket_scores) (const AffServe *s, const int32_t *idx,
								  const float *w, int64_t n, float *scores,
								  AffError *err);
	/*
	 * Items like item it: sims[0 .. n_items) and skip[j] = 1 for the items
	 * that are no answer (it itself, items the method has no value for);
	 * skip is overwritten.  NULL when the method has no item-to-item view.
	 */
	void		(*item_row) (const AffServe *s, int64_t it, float *sims,
							 uint8_t *skip);
	/* the score of item i for known user u */
	float		(*pair_score) (const AffServe *s, int64_t u, int64_t i);
	/*
	 * contrib[j] for each training item j of user u: its share of the
	 * score of item i.  NULL when the method is not personal.
	 */
	AffStatus	(*contributions) (const AffServe *s, int64_t u, int64_t i,
								  float *contrib, AffError *err);
	/*
	 * For a method over item features: the share of each of item i's
	 * features in user u's score of it (features feat[0 .. n), contrib),
	 * returning n (at most the features of the model); NULL otherwise.
	 */
	int64_t		(*feature_contributions) (const AffServe *s, int64_t u, int64_t i,
										  int32_t *feat, float *contrib);
	/*
	 * Content checks of the method's own sections and header fields, run
	 * by validation after the format's checks (instead of the option
	 * checks of the fitted methods); NULL for those.
	 */
	AffStatus	(*check_content) (const AffModelView *v, AffPollFn poll, void *poll_arg,
								  AffError *err);
	/* more figures for describe(): a JSON fragment "name": value, ... (NULL: none) */
	void		(*describe) (const AffModelView *v, char *buf, size_t len);
} AffMethod;

extern const AffMethod *aff_method_by_code(int code);
extern const AffMethod *aff_method_by_name(const char *name, size_t len);
extern const AffMethod *const aff_methods[];
extern const int aff_n_methods;

/* The methods (one file each). */
extern const AffMethod aff_method_implicit_als;
extern const AffMethod aff_method_popularity;
extern const AffMethod aff_method_ease;
extern const AffMethod aff_method_item_knn;
extern const AffMethod aff_method_item_profiles;
extern const AffMethod aff_method_content;
extern const AffMethod aff_method_sequential_rules;

/* Fit scaffolding shared by the method files (method.c). */
extern void aff_fit_header(AffModelParts *parts, const AffOptions *o,
						   const AffMatrix *m, int key_type);
extern AffStatus aff_fit_run(const AffMatrix *m, const AffOptions *o,
							 const AffFitContext *cx, AffModelParts *parts,
							 AffError *err);
extern int	aff_fit_progress(const AffFitContext *cx, const char *title,
							 const char *notice);

/*
 * What a fit would hold at its peak, for aff_fit_memory_guard: the estimate
 * and the figures its message names.
 */
typedef struct AffFitMemory
{
	double		bytes;			/* the estimate */
	const char *step;			/* what would need it ("Method \"ease\"") */
	double		interactions;
	double		users;
	double		items;
	bool		at_most;		/* users and items are upper bounds */
	int64_t		text_keys;		/* distinct text keys held (0: bigint keys) */
	double		text_bytes;		/* their texts */
	double		text_held_bytes;	/* the texts with their dictionaries */
	const char *remedy;			/* the hint after "Raise <limit>, " */
} AffFitMemory;

extern AffStatus aff_fit_memory_guard(double limit, const char *limit_name,
									  const AffFitMemory *need, AffError *err);
extern AffStatus aff_fit_check_memory(const AffFitContext *cx, const char *method,
									  double need, const AffMatrix *m,
									  AffError *err);
extern double aff_sparse_matrix_bytes(const AffMatrix *m);
extern AffStatus aff_check_confidences(const AffMatrix *m, const AffOptions *o,
									   AffError *err);
extern double aff_default_regularization(int method);

#endif							/* AFF_METHOD_H */
