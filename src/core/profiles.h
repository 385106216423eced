/*
 * profiles.h
 *		Item profiles: the item x feature matrix of a catalogue (sparse
 *		feature rows or dense vectors made elsewhere) as a model value of
 *		method item_profiles, and what builds it.
 *
 * A profiles value has no users and no training pairs (n_users = nnz = 0
 * in its header); it holds the catalogue's item keys, the section
 * profile_info (what kind of matrix, its normalisation, its counts), and
 * either the feature dictionary (SipHash keys under the header's
 * text_hash_key, texts, document frequencies) with the rows as CSR over
 * it, or one dense vector per item.  Values are stored after
 * normalisation, so a later reader uses them as they are.
 */
#ifndef AFF_PROFILES_H
#define AFF_PROFILES_H

#include "aff_core.h"
#include "interactions.h"
#include "model_format.h"

/* The fields of the profile_info section (int64 each). */
#define AFF_PINFO_KIND			0	/* AFF_PROFILE_SPARSE or AFF_PROFILE_DENSE */
#define AFF_PINFO_NORMALIZATION	1	/* AFF_NORM_* */
#define AFF_PINFO_MIN_DF		2	/* min_document_frequency as used (1 for dense) */
#define AFF_PINFO_FEATURES		3	/* features in the dictionary, or the dimension */
#define AFF_PINFO_DROPPED		4	/* features dropped under min_document_frequency */
#define AFF_PINFO_NONZEROS		5	/* stored values (dense: items x dimension) */
#define AFF_PINFO_EMPTY_ITEMS	6	/* items whose row is all zeros */
#define AFF_PINFO_COUNT			8	/* the section's length; the rest is zero */

#define AFF_PROFILE_SPARSE		1
#define AFF_PROFILE_DENSE		2

#define AFF_NORM_NONE			1
#define AFF_NORM_L2				2
#define AFF_NORM_TFIDF			3

/* Longest dense vector accepted. */
#define AFF_MAX_PROFILE_DIM		65536

/*
 * The sparse build: rows are (item key, feature key, value) in
 * AffTriple's (user, item, weight); feature keys are SipHash values of the
 * feature texts.  The rows are sorted in place.  Fills the item keys,
 * profile_info, feature keys and document frequencies, profile CSR, and
 * the header's counts in parts (which the caller cleared); the feature
 * texts are the caller's to add for the feature keys in parts.
 */
typedef struct AffProfileParams
{
	int			normalization;	/* AFF_NORM_* */
	int			min_df;			/* keep features in at least this many items */
	AffPollFn	poll;
	void	   *poll_arg;
} AffProfileParams;

typedef struct AffProfileBuild
{
	int64_t		n_items;
	int64_t		n_features;
	int64_t	   *item_keys;
	int64_t	   *feature_keys;
	int64_t		duplicates_summed;
	int64_t		dup_key;		/* dense: the item given twice, on AFF_ERR_INVALID */
	int64_t		bad_key[2];		/* sparse: item and feature of a sum out of range */
} AffProfileBuild;

extern AffStatus aff_profiles_build_sparse(AffTriple *rows, int64_t n,
										   const AffProfileParams *p,
										   const AffAllocator *a,
										   AffModelParts *parts,
										   AffProfileBuild *out, AffError *err);
extern AffStatus aff_profiles_build_dense(const int64_t *keys, const float *vecs,
										  int64_t n, int dim,
										  const AffProfileParams *p,
										  const AffAllocator *a,
										  AffModelParts *parts,
										  AffProfileBuild *out, AffError *err);
extern const char *aff_normalization_name(int code);

/* Shared with the content method, whose values carry their profiles. */
struct AffServe;
extern void aff_profiles_item_row(const struct AffServe *s, int64_t it, float *sims,
								  uint8_t *skip);
extern AffStatus aff_profiles_check_sections(const AffModelView *v, AffPollFn poll,
											 void *poll_arg, AffError *err);
extern void aff_profiles_describe(const AffModelView *v, char *buf, size_t len);

/* The content method's fit onto a profiles value's catalogue (method_content.c). */
extern AffStatus aff_content_attach(AffMatrix *m, const AffModelView *pv,
									AffModelParts *parts, const AffAllocator *a,
									AffError *err);

#endif							/* AFF_PROFILES_H */
