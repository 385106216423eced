/*
 * model_format.h
 *		The binary layout of an affinity.model value, version 1.
 *
 * A value is a fixed header, a table of sections, then the sections, each
 * starting on an 8-byte boundary.  All numbers are little-endian (the
 * engine refuses to build on a big-endian machine).  Offsets count from the
 * first byte of the value, whose first four bytes are PostgreSQL's varlena
 * length word: the engine leaves them alone and the checksum skips them.
 *
 * Every way a value enters the server runs aff_model_validate, which checks
 * the whole layout; serving code then reads it through an AffModelView.
 */
#ifndef AFF_MODEL_FORMAT_H
#define AFF_MODEL_FORMAT_H

#include "aff_core.h"

#define AFF_FORMAT_VERSION	1

/*
 * The largest value the extension writes or accepts: its base64 text form
 * (4/3 of the bytes) must stay under PostgreSQL's 1 GB string limit with room
 * for the other columns of a dumped row, since pg_dump reads values as text.
 */
#define AFF_MAX_MODEL_BYTES	((uint64_t) 720 * 1024 * 1024)
#define AFF_MAGIC			"AFMD"

/*
 * Bytes a long single-threaded step over a value (copy, hash, scan) handles
 * between two calls of its poll callback: milliseconds of work, so a cancel
 * is seen well within a second.  A multiple of 8 (whole words of aff_hash);
 * tests may build the engine with a smaller one to cross many chunk edges.
 */
#ifndef AFF_POLL_BYTES
#define AFF_POLL_BYTES		((uint64_t) 16 * 1024 * 1024)
#endif

/* Section kinds. */
#define AFF_SEC_USER_KEYS		1	/* int64 [n_users], strictly ascending */
#define AFF_SEC_ITEM_KEYS		2	/* int64 [n_items], strictly ascending */
#define AFF_SEC_USER_FACTORS	3	/* float [n_users * factors] */
#define AFF_SEC_ITEM_FACTORS	4	/* float [n_items * factors] */
#define AFF_SEC_SEEN_PTR		5	/* int64 [n_users + 1] CSR offsets */
#define AFF_SEC_SEEN_ITEMS		6	/* int32 [nnz] item indices, ascending per user */
#define AFF_SEC_SEEN_WEIGHTS	7	/* float [nnz] summed training weights */
#define AFF_SEC_POPULARITY		8	/* float [n_items] distinct training users */
#define AFF_SEC_LOSS			9	/* double [sweeps] training loss per sweep */
#define AFF_SEC_SWEEP_SECONDS	10	/* double [sweeps] wall time per sweep */
#define AFF_SEC_ITEM_WEIGHTS	11	/* float [n_items * n_items] row-major B (ease) */
#define AFF_SEC_NEIGHBOR_PTR	12	/* int64 [n_items + 1] CSR offsets (item_knn) */
#define AFF_SEC_NEIGHBOR_IDX	13	/* int32 [neighbor count] item indices */
#define AFF_SEC_NEIGHBOR_SIM	14	/* float [neighbor count] similarities */
#define AFF_SEC_USER_TEXT_OFF	15	/* int64 [n_users + 1] offsets into the user text */
#define AFF_SEC_USER_TEXT		16	/* bytes: the users' text keys, back to back */
#define AFF_SEC_ITEM_TEXT_OFF	17	/* int64 [n_items + 1] */
#define AFF_SEC_ITEM_TEXT		18	/* bytes */
/* item_profiles (profiles.h): which of them a value holds, profile_info says */
#define AFF_SEC_PROFILE_INFO	19	/* int64 [8]: kind, normalisation, counts */
#define AFF_SEC_FEATURE_KEYS	20	/* int64 [features] SipHash keys, strictly ascending */
#define AFF_SEC_FEATURE_TEXT_OFF 21 /* int64 [features + 1] */
#define AFF_SEC_FEATURE_TEXT	22	/* bytes: the feature texts, back to back */
#define AFF_SEC_FEATURE_ITEMS	23	/* int32 [features] items holding each (df) */
#define AFF_SEC_PROFILE_PTR		24	/* int64 [n_items + 1] CSR offsets */
#define AFF_SEC_PROFILE_FEATURES 25 /* int32 [nonzeros] feature indices, ascending per item */
#define AFF_SEC_PROFILE_VALUES	26	/* float [nonzeros] values after normalisation */
#define AFF_SEC_PROFILE_VECTORS 27	/* float [n_items * dimension] dense rows */
/* content: each user's preference vector over the profiles' features */
#define AFF_SEC_USER_PROFILES	28	/* float [n_users * features] */
/* sequential_rules (sequences.h): its rules are in the neighbour sections */
#define AFF_SEC_SEQUENCE_INFO	29	/* int64 [12]: window, successors, counts */
#define AFF_SEC_MAX				29

typedef struct AffModelHeader
{
	uint32_t	varlena_word;	/* owned by PostgreSQL */
	char		magic[4];
	uint16_t	version;
	uint16_t	method;
	uint16_t	key_type;
	uint16_t	n_sections;
	uint64_t	total_size;		/* bytes of the whole value */
	uint64_t	checksum;		/* of every byte but the first 4 and this field */
	uint64_t	fingerprint;	/* of the content without timings and peak memory */
	int64_t		n_users;
	int64_t		n_items;
	int64_t		nnz;
	/* options as used */
	int32_t		factors;
	int32_t		iterations;
	int32_t		solver;
	int32_t		solver_steps;
	int32_t		confidence;
	int32_t		threads;
	int32_t		min_user_interactions;
	int32_t		min_item_interactions;
	int32_t		neighbors;
	int32_t		max_items;
	double		regularization;
	double		alpha;
	double		epsilon;
	int64_t		seed;
	/* input and fit statistics */
	int64_t		rows_read;
	int64_t		rows_skipped_null;
	int64_t		rows_skipped_zero;
	int64_t		duplicates_summed;
	int64_t		dropped_users;
	int64_t		dropped_items;
	int64_t		dropped_interactions;
	int64_t		peak_memory;	/* bytes, 0 when not measured */
	double		fit_seconds;	/* wall time of the final step (not in fingerprint) */
	/*
	 * Added after 1.1 in what was reserved (zero) space, so 1.1 values keep
	 * their meaning: a zero field means "not set by the writer".
	 */
	uint8_t		content_digest[32];	/* SHA-256 identity of the content, 0 = unset */
	uint64_t	text_hash_key[2];	/* per-model key of the text-key hash, 0 = 1.1 hash */
} AffModelHeader;

typedef struct AffSection
{
	uint32_t	kind;
	uint32_t	elem_size;
	uint64_t	offset;
	uint64_t	count;
} AffSection;

/* Read-only view of a validated value; pointers point into its bytes. */
typedef struct AffModelView
{
	const AffModelHeader *h;
	const int64_t *user_keys;
	const int64_t *item_keys;
	const float *user_factors;
	const float *item_factors;
	const int64_t *seen_ptr;
	const int32_t *seen_items;
	const float *seen_weights;
	const float *popularity;
	const double *loss;
	const double *sweep_seconds;
	int64_t		n_sweeps;
	const float *item_weights;	/* ease: B[i * n_items + j] */
	const int64_t *neighbor_ptr;	/* item_knn: neighbours of item i are */
	const int32_t *neighbor_idx;	/* neighbor_idx[neighbor_ptr[i] .. */
	const float *neighbor_sim;	/* neighbor_ptr[i + 1]) */
	uint64_t	neighbor_count;
	/*
	 * text keys: key i is text[off[i] .. off[i + 1]); its int64 key is
	 * aff_text_key() of it under h->text_hash_key (text_key.h)
	 */
	const int64_t *user_text_off;
	const char *user_text;
	const int64_t *item_text_off;
	const char *item_text;
	uint64_t	user_text_len;
	uint64_t	item_text_len;
	/* every section by kind (NULL when absent), with its element count */
	const void *sections[AFF_SEC_MAX + 1];
	uint64_t	counts[AFF_SEC_MAX + 1];
} AffModelView;

/* What an encoder is given: header fields filled, arrays by section kind. */
typedef struct AffModelParts
{
	AffModelHeader h;			/* all but magic, sizes, checksums */
	const void *data[AFF_SEC_MAX + 1];
	uint64_t	count[AFF_SEC_MAX + 1];
} AffModelParts;

/*
 * The description of each section kind, the one place that says what a
 * model holds.  Size, view, validation, forget_user and describe() read it.
 */
typedef enum AffSectionNeed
{
	AFF_NEED_ALL,				/* every model */
	AFF_NEED_USER_TEXT,			/* models with text user keys (and only those) */
	AFF_NEED_ITEM_TEXT,			/* models with text item keys (and only those) */
	AFF_NEED_METHOD,			/* the methods whose AffMethod.sections list it */
	AFF_NEED_METHOD_ALLOW_ANY,	/* as METHOD, but any model may carry it */
	AFF_NEED_METHOD_OPTIONAL	/* only the methods listing it may carry it; their
								 * check_content says when it is needed */
} AffSectionNeed;

typedef enum AffSectionCount
{
	AFF_COUNT_USERS,			/* n_users */
	AFF_COUNT_ITEMS,			/* n_items */
	AFF_COUNT_USERS_PLUS_1,		/* n_users + 1 (offsets) */
	AFF_COUNT_ITEMS_PLUS_1,
	AFF_COUNT_USERS_X_FACTORS,	/* n_users * factors */
	AFF_COUNT_ITEMS_X_FACTORS,
	AFF_COUNT_ITEMS_SQUARED,	/* n_items^2 */
	AFF_COUNT_NNZ,				/* nnz */
	AFF_COUNT_FREE,				/* any count (content checks bound it) */
	AFF_COUNT_SAME_AS,			/* the count of section same_as */
	AFF_COUNT_FIXED				/* exactly same_as elements */
} AffSectionCount;

typedef enum AffSectionForget
{
	AFF_FORGET_KEEP,			/* forget_user copies it as it is */
	AFF_FORGET_CUT_USER,		/* one element per user: the user's is cut */
	AFF_FORGET_CUT_USER_ROW,	/* factors elements per user: the user's row is cut */
	AFF_FORGET_CUT_SEEN,		/* one element per training pair: the user's are cut */
	AFF_FORGET_CUT_TEXT,		/* the user's text bytes are cut */
	AFF_FORGET_CUT_OFFSETS,		/* offsets per user: the user's entry cut, later ones shifted */
	AFF_FORGET_UNCOUNT,			/* per-item user counts: the user's items count one less */
	AFF_FORGET_CUT_USER_SPAN	/* count / n_users elements per user: the user's are cut */
} AffSectionForget;

typedef struct AffSectionDef
{
	int			kind;
	const char *name;
	uint32_t	elem_size;
	AffSectionNeed need;
	AffSectionCount count;
	int			same_as;		/* AFF_COUNT_SAME_AS: that kind; AFF_COUNT_FIXED: the count */
	AffSectionForget forget;
} AffSectionDef;

extern const AffSectionDef aff_section_defs[AFF_SEC_MAX + 1];
extern uint64_t aff_section_expected_count(const AffSectionDef *d,
										   const AffModelHeader *h,
										   const uint64_t *counts);
extern size_t aff_section_elem_size(int kind);
extern AffStatus aff_model_size(const AffModelParts *parts, uint64_t *size,
								AffError *err);
extern void aff_model_write(const AffModelParts *parts, uint8_t *buf,
							uint64_t size);
extern AffStatus aff_model_write_polled(const AffModelParts *parts, uint8_t *buf,
										uint64_t size, AffPollFn poll, void *poll_arg,
										AffError *err);
extern AffStatus aff_model_validate(const uint8_t *buf, uint64_t len,
									AffModelView *view, AffError *err);
extern AffStatus aff_model_validate_polled(const uint8_t *buf, uint64_t len,
										   AffModelView *view, AffPollFn poll,
										   void *poll_arg, AffError *err);
extern AffStatus aff_model_view(const uint8_t *buf, uint64_t len,
								AffModelView *view, AffError *err);
extern uint64_t aff_hash(const uint8_t *p, uint64_t n, uint64_t h);
extern uint64_t aff_model_checksum(const uint8_t *buf, uint64_t len);
extern AffStatus aff_model_checksum_polled(const uint8_t *buf, uint64_t len,
										   AffPollFn poll, void *poll_arg,
										   uint64_t *sum, AffError *err);
extern const char *aff_method_name(int method);

#endif
