/*
 * model_format.c
 *		Encode, validate and view affinity.model values (layout in
 *		model_format.h).
 *
 * Validation is complete: the header, every section's kind, size, offset
 * and bounds, overlaps, the checksum, and the content (sorted keys, finite
 * numbers, CSR offsets and indices in range).  A value that passes can be
 * read by the serving code without further bounds checks.
 */
#include "model_format.h"
#include "text_key.h"
#include "method.h"

#include <math.h>
#include <string.h>

#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "affinity's model format is little-endian; this machine is not"
#endif

_Static_assert(sizeof(AffModelHeader) == 256, "model header must be 256 bytes");
_Static_assert(sizeof(AffSection) == 24, "section entry must be 24 bytes");

#define ALIGN8(x) (((x) + 7) & ~(uint64_t) 7)

/*
 * The sections.  Index = kind; entry 0 is unused.  A new kind gets a number
 * in model_format.h, an entry here, a pointer in AffModelView (set in
 * aff_model_view) and, if its content needs more than a count, a check in
 * check_content.
 */
const AffSectionDef aff_section_defs[AFF_SEC_MAX + 1] = {
	{0, NULL, 0, AFF_NEED_ALL, AFF_COUNT_FREE, 0, AFF_FORGET_KEEP},
	{AFF_SEC_USER_KEYS, "user_keys", 8, AFF_NEED_ALL, AFF_COUNT_USERS, 0, AFF_FORGET_CUT_USER},
	{AFF_SEC_ITEM_KEYS, "item_keys", 8, AFF_NEED_ALL, AFF_COUNT_ITEMS, 0, AFF_FORGET_KEEP},
	{AFF_SEC_USER_FACTORS, "user_factors", 4, AFF_NEED_METHOD, AFF_COUNT_USERS_X_FACTORS, 0,
	AFF_FORGET_CUT_USER_ROW},
	{AFF_SEC_ITEM_FACTORS, "item_factors", 4, AFF_NEED_METHOD, AFF_COUNT_ITEMS_X_FACTORS, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_SEEN_PTR, "seen_ptr", 8, AFF_NEED_ALL, AFF_COUNT_USERS_PLUS_1, 0, AFF_FORGET_CUT_OFFSETS},
	{AFF_SEC_SEEN_ITEMS, "seen_items", 4, AFF_NEED_ALL, AFF_COUNT_NNZ, 0, AFF_FORGET_CUT_SEEN},
	{AFF_SEC_SEEN_WEIGHTS, "seen_weights", 4, AFF_NEED_ALL, AFF_COUNT_NNZ, 0, AFF_FORGET_CUT_SEEN},
	{AFF_SEC_POPULARITY, "popularity", 4, AFF_NEED_ALL, AFF_COUNT_ITEMS, 0, AFF_FORGET_UNCOUNT},
	{AFF_SEC_LOSS, "loss", 8, AFF_NEED_METHOD_ALLOW_ANY, AFF_COUNT_FREE, 0, AFF_FORGET_KEEP},
	{AFF_SEC_SWEEP_SECONDS, "sweep_seconds", 8, AFF_NEED_METHOD_ALLOW_ANY, AFF_COUNT_SAME_AS,
	AFF_SEC_LOSS, AFF_FORGET_KEEP},
	{AFF_SEC_ITEM_WEIGHTS, "item_weights", 4, AFF_NEED_METHOD, AFF_COUNT_ITEMS_SQUARED, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_NEIGHBOR_PTR, "neighbor_ptr", 8, AFF_NEED_METHOD, AFF_COUNT_ITEMS_PLUS_1, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_NEIGHBOR_IDX, "neighbor_idx", 4, AFF_NEED_METHOD, AFF_COUNT_FREE, 0, AFF_FORGET_KEEP},
	{AFF_SEC_NEIGHBOR_SIM, "neighbor_sim", 4, AFF_NEED_METHOD, AFF_COUNT_SAME_AS,
	AFF_SEC_NEIGHBOR_IDX, AFF_FORGET_KEEP},
	{AFF_SEC_USER_TEXT_OFF, "user_text_off", 8, AFF_NEED_USER_TEXT, AFF_COUNT_USERS_PLUS_1, 0,
	AFF_FORGET_CUT_OFFSETS},
	{AFF_SEC_USER_TEXT, "user_text", 1, AFF_NEED_USER_TEXT, AFF_COUNT_FREE, 0, AFF_FORGET_CUT_TEXT},
	{AFF_SEC_ITEM_TEXT_OFF, "item_text_off", 8, AFF_NEED_ITEM_TEXT, AFF_COUNT_ITEMS_PLUS_1, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_ITEM_TEXT, "item_text", 1, AFF_NEED_ITEM_TEXT, AFF_COUNT_FREE, 0, AFF_FORGET_KEEP},
	/* item_profiles: its check_content checks the free counts and the content */
	{AFF_SEC_PROFILE_INFO, "profile_info", 8, AFF_NEED_METHOD, AFF_COUNT_FIXED, 8, AFF_FORGET_KEEP},
	{AFF_SEC_FEATURE_KEYS, "feature_keys", 8, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_FREE, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_FEATURE_TEXT_OFF, "feature_text_off", 8, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_FREE, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_FEATURE_TEXT, "feature_text", 1, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_FREE, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_FEATURE_ITEMS, "feature_items", 4, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_SAME_AS,
	AFF_SEC_FEATURE_KEYS, AFF_FORGET_KEEP},
	{AFF_SEC_PROFILE_PTR, "profile_ptr", 8, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_ITEMS_PLUS_1, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_PROFILE_FEATURES, "profile_features", 4, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_FREE, 0,
	AFF_FORGET_KEEP},
	{AFF_SEC_PROFILE_VALUES, "profile_values", 4, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_SAME_AS,
	AFF_SEC_PROFILE_FEATURES, AFF_FORGET_KEEP},
	{AFF_SEC_PROFILE_VECTORS, "profile_vectors", 4, AFF_NEED_METHOD_OPTIONAL, AFF_COUNT_FREE, 0,
	AFF_FORGET_KEEP},
	/* content: n_users x features, checked by its check_content */
	{AFF_SEC_USER_PROFILES, "user_profiles", 4, AFF_NEED_METHOD, AFF_COUNT_FREE, 0,
	AFF_FORGET_CUT_USER_SPAN},
	/* sequential_rules: its check_content checks the figures */
	{AFF_SEC_SEQUENCE_INFO, "sequence_info", 8, AFF_NEED_METHOD, AFF_COUNT_FIXED, 12, AFF_FORGET_KEEP},
};

size_t
aff_section_elem_size(int kind)
{
	if (kind < 1 || kind > AFF_SEC_MAX)
		return 0;
	return aff_section_defs[kind].elem_size;
}

/*
 * The count that section d must have in a model with header h (whose
 * counts were checked to be in range) and section counts counts[];
 * UINT64_MAX for a free count.
 */
uint64_t
aff_section_expected_count(const AffSectionDef *d, const AffModelHeader *h,
						   const uint64_t *counts)
{
	uint64_t	f = (uint64_t) h->factors;

	switch (d->count)
	{
		case AFF_COUNT_USERS:
			return (uint64_t) h->n_users;
		case AFF_COUNT_ITEMS:
			return (uint64_t) h->n_items;
		case AFF_COUNT_USERS_PLUS_1:
			return (uint64_t) h->n_users + 1;
		case AFF_COUNT_ITEMS_PLUS_1:
			return (uint64_t) h->n_items + 1;
		case AFF_COUNT_USERS_X_FACTORS:
			return (uint64_t) h->n_users * f;
		case AFF_COUNT_ITEMS_X_FACTORS:
			return (uint64_t) h->n_items * f;
		case AFF_COUNT_ITEMS_SQUARED:
			return (uint64_t) h->n_items * (uint64_t) h->n_items;
		case AFF_COUNT_NNZ:
			return (uint64_t) h->nnz;
		case AFF_COUNT_SAME_AS:
			return counts[d->same_as];
		case AFF_COUNT_FIXED:
			return (uint64_t) d->same_as;
		case AFF_COUNT_FREE:
			break;
	}
	return UINT64_MAX;
}

_Static_assert(AFF_POLL_BYTES % 8 == 0 && AFF_POLL_BYTES > 0,
			   "a poll chunk holds whole words of the hash");

/* Ask poll (when there is one) whether to stop; the cancel error if so. */
static AffStatus
poll_now(AffPollFn poll, void *poll_arg, AffError *err)
{
	if (poll != NULL && poll(poll_arg))
		return aff_fail(err, AFF_ERR_CANCELLED, "writing or checking the model was cancelled");
	return AFF_OK;
}

/*
 * A budget of work between two polls: poll_due() takes the bytes just
 * handled and calls poll once every AFF_POLL_BYTES of them.
 */
typedef struct Poller
{
	AffPollFn	fn;
	void	   *arg;
	uint64_t	left;			/* bytes until the next poll */
} Poller;

static void
poller_init(Poller *p, AffPollFn fn, void *arg)
{
	p->fn = fn;
	p->arg = arg;
	p->left = AFF_POLL_BYTES;
}

/* Nonzero when the callback, due after bytes more, asks to stop. */
static inline int
poll_due(Poller *p, uint64_t bytes)
{
	if (p->fn == NULL)
		return 0;
	if (bytes < p->left)
	{
		p->left -= bytes;
		return 0;
	}
	p->left = AFF_POLL_BYTES;
	return p->fn(p->arg) != 0;
}

static AffStatus
poller_cancelled(AffError *err)
{
	return aff_fail(err, AFF_ERR_CANCELLED, "writing or checking the model was cancelled");
}

/* The word loop of aff_hash over n bytes, n a multiple of 8. */
static uint64_t
hash_words(const uint8_t *p, uint64_t n, uint64_t h)
{
	const uint64_t K = 0x9e3779b97f4a7c15ULL;
	uint64_t	w;

	while (n >= 8)
	{
		memcpy(&w, p, 8);
		h = (h ^ w) * K;
		h ^= h >> 32;
		p += 8;
		n -= 8;
	}
	return h;
}

/* A word-at-a-time multiply-xorshift hash: detects damage, not attacks. */
uint64_t
aff_hash(const uint8_t *p, uint64_t n, uint64_t h)
{
	const uint64_t K = 0x9e3779b97f4a7c15ULL;
	uint64_t	whole = n & ~(uint64_t) 7;
	uint64_t	w;

	h = hash_words(p, whole, h);
	p += whole;
	n -= whole;
	w = 0;
	memcpy(&w, p, n);
	h = (h ^ w ^ (n << 56)) * K;
	h ^= h >> 29;
	return h;
}

/*
 * aff_hash of n bytes in chunks of AFF_POLL_BYTES (whole words, so the
 * result is the one-pass result), polling between chunks.
 */
static AffStatus
hash_polled(const uint8_t *p, uint64_t n, uint64_t *h, AffPollFn poll, void *poll_arg,
			AffError *err)
{
	while (n > AFF_POLL_BYTES)
	{
		*h = hash_words(p, AFF_POLL_BYTES, *h);
		p += AFF_POLL_BYTES;
		n -= AFF_POLL_BYTES;
		if (poll_now(poll, poll_arg, err) != AFF_OK)
			return err->status;
	}
	*h = aff_hash(p, n, *h);
	return AFF_OK;
}

/*
 * Checksum of a value of len bytes: all but the length word and itself;
 * polls between chunks (poll may be NULL).
 */
AffStatus
aff_model_checksum_polled(const uint8_t *buf, uint64_t len, AffPollFn poll, void *poll_arg,
						  uint64_t *sum, AffError *err)
{
	size_t		off = offsetof(AffModelHeader, checksum);
	uint64_t	h = 0x5851f42d4c957f2dULL;

	h = aff_hash(buf + 4, off - 4, h);
	if (hash_polled(buf + off + 8, len - off - 8, &h, poll, poll_arg, err) != AFF_OK)
		return err->status;
	*sum = h ^ (h >> 31);
	return AFF_OK;
}

/* Checksum of a value of len bytes, in one go. */
uint64_t
aff_model_checksum(const uint8_t *buf, uint64_t len)
{
	AffError	err;
	uint64_t	sum = 0;

	(void) aff_model_checksum_polled(buf, len, NULL, NULL, &sum, &err);
	return sum;
}

static uint64_t
table_end(int n_sections)
{
	return ALIGN8(sizeof(AffModelHeader) + (uint64_t) n_sections * sizeof(AffSection));
}

/* Total size of the value that aff_model_write would produce. */
AffStatus
aff_model_size(const AffModelParts *parts, uint64_t *size, AffError *err)
{
	int			n = 0;
	int			k;
	uint64_t	total;

	for (k = 1; k <= AFF_SEC_MAX; k++)
		if (parts->data[k] != NULL)
			n++;
	total = table_end(n);
	for (k = 1; k <= AFF_SEC_MAX; k++)
	{
		size_t		bytes;

		if (parts->data[k] == NULL)
			continue;
		if (aff_mul_overflows(parts->count[k], aff_section_elem_size(k), &bytes) ||
			total + ALIGN8(bytes) < total)
			return aff_fail(err, AFF_ERR_LIMIT, "model is too large");
		total += ALIGN8(bytes);
	}
	*size = total;
	return AFF_OK;
}

/*
 * Copy bytes from src to dst and fold them into the fingerprint *fp (as
 * aff_hash(dst, bytes, *fp) would), a chunk of AFF_POLL_BYTES at a time
 * with a poll between chunks.  hash says whether the bytes are
 * fingerprinted.
 */
static AffStatus
copy_section(uint8_t *dst, const uint8_t *src, uint64_t bytes, bool hash, uint64_t *fp,
			 AffPollFn poll, void *poll_arg, AffError *err)
{
	while (bytes > AFF_POLL_BYTES)
	{
		memcpy(dst, src, AFF_POLL_BYTES);
		if (hash)
			*fp = hash_words(dst, AFF_POLL_BYTES, *fp);
		dst += AFF_POLL_BYTES;
		src += AFF_POLL_BYTES;
		bytes -= AFF_POLL_BYTES;
		if (poll_now(poll, poll_arg, err) != AFF_OK)
			return err->status;
	}
	if (bytes > 0)
		memcpy(dst, src, bytes);
	if (hash)
		*fp = aff_hash(dst, bytes, *fp);
	return AFF_OK;
}

/*
 * Write the value into buf (size bytes from aff_model_size), polling
 * between chunks of every section (poll may be NULL); AFF_ERR_CANCELLED
 * when poll asks to stop, with buf half written.  The bytes no section
 * covers (the length word, the table's and each section's padding) are
 * zeroed, and every other byte is written once, so equal content gives
 * equal bytes.
 */
AffStatus
aff_model_write_polled(const AffModelParts *parts, uint8_t *buf, uint64_t size,
					   AffPollFn poll, void *poll_arg, AffError *err)
{
	AffModelHeader h = parts->h;
	AffSection *table = (AffSection *) (buf + sizeof(AffModelHeader));
	uint64_t	off;
	uint64_t	fp = 0x2545f4914f6cdd1dULL;
	uint64_t	sum;
	int			n = 0;
	int			k;

	for (k = 1; k <= AFF_SEC_MAX; k++)
		if (parts->data[k] != NULL)
			n++;
	memcpy(h.magic, AFF_MAGIC, 4);
	h.version = AFF_FORMAT_VERSION;
	h.n_sections = (uint16_t) n;
	h.total_size = size;
	h.checksum = 0;
	h.fingerprint = 0;

	off = table_end(n);
	memset(buf, 0, off);
	n = 0;
	for (k = 1; k <= AFF_SEC_MAX; k++)
	{
		uint64_t	bytes;

		if (parts->data[k] == NULL)
			continue;
		bytes = parts->count[k] * aff_section_elem_size(k);
		table[n].kind = (uint32_t) k;
		table[n].elem_size = (uint32_t) aff_section_elem_size(k);
		table[n].offset = off;
		table[n].count = parts->count[k];
		if (copy_section(buf + off, parts->data[k], bytes, k != AFF_SEC_SWEEP_SECONDS, &fp,
						 poll, poll_arg, err) != AFF_OK)
			return err->status;
		memset(buf + off + bytes, 0, ALIGN8(bytes) - bytes);
		off += ALIGN8(bytes);
		n++;
	}

	/* the fingerprint leaves out wall-clock timings and the measured peak memory */
	{
		AffModelHeader hc = h;

		hc.varlena_word = 0;
		hc.fit_seconds = 0;
		hc.peak_memory = 0;		/* a measurement too: buffer sizes vary with the plan */
		fp = aff_hash((const uint8_t *) &hc, sizeof(hc), fp);
		fp = aff_hash((const uint8_t *) table, (uint64_t) n * sizeof(AffSection), fp);
	}
	h.fingerprint = fp;
	memcpy(buf + 4, ((const uint8_t *) &h) + 4, sizeof(h) - 4);
	if (aff_model_checksum_polled(buf, size, poll, poll_arg, &sum, err) != AFF_OK)
		return err->status;
	memcpy(buf + offsetof(AffModelHeader, checksum), &sum, 8);
	return AFF_OK;
}

/* Write the value into buf in one go (aff_model_write_polled without a poll). */
void
aff_model_write(const AffModelParts *parts, uint8_t *buf, uint64_t size)
{
	AffError	err;

	(void) aff_model_write_polled(parts, buf, size, NULL, NULL, &err);
}

/*
 * Whether a model of method meth and header h needs section d (1), may
 * carry it (0) or may not (-1).
 */
static int
section_need(const AffSectionDef *d, const AffMethod *meth, const AffModelHeader *h)
{
	bool		listed = (meth->sections & (1u << d->kind)) != 0;

	switch (d->need)
	{
		case AFF_NEED_ALL:
			return 1;
		case AFF_NEED_USER_TEXT:
			return aff_keys_side_text(h->key_type, 1) ? 1 : -1;
		case AFF_NEED_ITEM_TEXT:
			return aff_keys_side_text(h->key_type, 0) ? 1 : -1;
		case AFF_NEED_METHOD:
			return listed ? 1 : -1;
		case AFF_NEED_METHOD_ALLOW_ANY:
			return listed ? 1 : 0;
		case AFF_NEED_METHOD_OPTIONAL:
			return listed ? 0 : -1;
	}
	return -1;
}

static AffStatus
corrupt(AffError *err, const char *fmt, uint64_t a, uint64_t b)
{
	aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
	return aff_detail(err, fmt, (unsigned long long) a, (unsigned long long) b);
}

/*
 * Structural view: header, section table, bounds and overlaps, required
 * sections and their counts.  O(number of sections); no content scan and
 * no checksum.  Used by validation and, for values already validated on
 * their way in, by the serving functions.
 */
AffStatus
aff_model_view(const uint8_t *buf, uint64_t len, AffModelView *v, AffError *err)
{
	const AffModelHeader *h = (const AffModelHeader *) buf;
	const AffSection *table;
	const void *sec[AFF_SEC_MAX + 1] = {0};
	uint64_t	cnt[AFF_SEC_MAX + 1] = {0};
	uint64_t	data_start;
	const AffMethod *meth;
	int			i;
	int			j;
	int			k;

	memset(v, 0, sizeof(*v));
	if (((uintptr_t) buf & 7) != 0)
		return corrupt(err, "The value is not 8-byte aligned in memory.",
					   (uint64_t) (uintptr_t) buf & 7, 0);
	if (len < sizeof(AffModelHeader))
		return corrupt(err, "The value has %llu bytes, fewer than the %llu of a header.",
					   len, sizeof(AffModelHeader));
	if (memcmp(h->magic, AFF_MAGIC, 4) != 0)
		return corrupt(err, "The value does not start with the model signature.", 0, 0);
	if (h->version != AFF_FORMAT_VERSION)
	{
		aff_fail(err, AFF_ERR_CORRUPT, "unsupported affinity.model format version %u",
				 (unsigned) h->version);
		return aff_detail(err, "This build of affinity reads format version %d.",
						  AFF_FORMAT_VERSION);
	}
	if (h->total_size != len)
		return corrupt(err, "The header says %llu bytes but the value has %llu.",
					   h->total_size, len);
	if (h->n_sections > AFF_SEC_MAX)
		return corrupt(err, "The value lists %llu sections; at most %llu exist.",
					   h->n_sections, AFF_SEC_MAX);
	data_start = table_end(h->n_sections);
	if (data_start > len)
		return corrupt(err, "The section table ends at byte %llu, past the end.",
					   data_start, len);
	table = (const AffSection *) (buf + sizeof(AffModelHeader));
	for (i = 0; i < h->n_sections; i++)
	{
		const AffSection *s = &table[i];
		size_t		bytes;

		if (s->kind < 1 || s->kind > AFF_SEC_MAX || sec[s->kind] != NULL)
			return corrupt(err, "Section %llu has an unknown or repeated kind %llu.",
						   i, s->kind);
		if (s->elem_size != aff_section_elem_size((int) s->kind))
			return corrupt(err, "Section kind %llu has element size %llu.",
						   s->kind, s->elem_size);
		if ((s->offset & 7) != 0 || s->offset < data_start || s->offset > len)
			return corrupt(err, "Section kind %llu starts at a bad offset %llu.",
						   s->kind, s->offset);
		if (aff_mul_overflows(s->count, s->elem_size, &bytes) || bytes > len - s->offset)
			return corrupt(err, "Section kind %llu with %llu elements runs past the end.",
						   s->kind, s->count);
		for (j = 0; j < i; j++)
		{
			const AffSection *o = &table[j];
			uint64_t	obytes = o->count * o->elem_size;

			if (s->offset < o->offset + obytes && o->offset < s->offset + bytes)
				return corrupt(err, "Sections of kinds %llu and %llu overlap.",
							   s->kind, o->kind);
		}
		sec[s->kind] = buf + s->offset;
		cnt[s->kind] = s->count;
	}

	if ((meth = aff_method_by_code(h->method)) == NULL)
		return corrupt(err, "Unknown method code %llu.", h->method, 0);
	if (!aff_keys_valid(h->key_type))
		return corrupt(err, "Unknown key type code %llu.", h->key_type, 0);
	/* a catalogue value (item content) has no users and no training pairs */
	if ((meth->catalogue ? h->n_users != 0 || h->nnz != 0 : h->n_users < 1 || h->nnz < 1) ||
		h->n_items < 1 ||
		h->n_users > AFF_MAX_ENTITIES || h->n_items > AFF_MAX_ENTITIES)
		return corrupt(err, "Bad counts: %llu users, %llu items.",
					   (uint64_t) h->n_users, (uint64_t) h->n_items);
	for (k = 1; k <= AFF_SEC_MAX; k++)
		if (sec[k] != NULL && section_need(&aff_section_defs[k], meth, h) < 0)
			return corrupt(err, "The value holds sections that its method (code %llu) or key type (code %llu) does not use.",
						   h->method, h->key_type);
	if (meth->has_factors && (h->factors < 1 || h->factors > AFF_MAX_FACTORS))
		return corrupt(err, "Factor count %llu is outside 1..%llu.",
					   (uint64_t) (int64_t) h->factors, AFF_MAX_FACTORS);
	if (!meth->has_factors && h->factors != 0)
	{
		aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
		return aff_detail(err, "Method \"%s\" has no factors, but the header says %lld.",
						  meth->name, (long long) h->factors);
	}
	for (k = 1; k <= AFF_SEC_MAX; k++)
	{
		const AffSectionDef *d = &aff_section_defs[k];
		uint64_t	want;

		if (sec[k] == NULL && section_need(d, meth, h) > 0)
		{
			aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
			return aff_detail(err, "The value has no \"%s\" section, which a model of method \"%s\" with %s keys needs.",
							  d->name, meth->name, aff_keys_name(h->key_type));
		}
		/* a section counted like another comes with it (loss and sweep_seconds, ...) */
		if (d->count == AFF_COUNT_SAME_AS && (sec[k] == NULL) != (sec[d->same_as] == NULL))
		{
			aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
			return aff_detail(err, "The value has a \"%s\" section without its \"%s\" section, or the other way round.",
							  d->name, aff_section_defs[d->same_as].name);
		}
		if (sec[k] == NULL)
			continue;
		want = aff_section_expected_count(d, h, cnt);
		if (want != UINT64_MAX && cnt[k] != want)
		{
			aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
			return aff_detail(err, "Section \"%s\" holds %llu elements; this model needs %llu.",
							  d->name, (unsigned long long) cnt[k], (unsigned long long) want);
		}
	}

	v->h = h;
	memcpy(v->sections, sec, sizeof(v->sections));
	memcpy(v->counts, cnt, sizeof(v->counts));
	v->user_text_off = sec[AFF_SEC_USER_TEXT_OFF];
	v->user_text = sec[AFF_SEC_USER_TEXT];
	v->item_text_off = sec[AFF_SEC_ITEM_TEXT_OFF];
	v->item_text = sec[AFF_SEC_ITEM_TEXT];
	v->user_text_len = cnt[AFF_SEC_USER_TEXT];
	v->item_text_len = cnt[AFF_SEC_ITEM_TEXT];
	v->item_weights = sec[AFF_SEC_ITEM_WEIGHTS];
	v->neighbor_ptr = sec[AFF_SEC_NEIGHBOR_PTR];
	v->neighbor_idx = sec[AFF_SEC_NEIGHBOR_IDX];
	v->neighbor_sim = sec[AFF_SEC_NEIGHBOR_SIM];
	v->user_keys = sec[AFF_SEC_USER_KEYS];
	v->item_keys = sec[AFF_SEC_ITEM_KEYS];
	v->user_factors = sec[AFF_SEC_USER_FACTORS];
	v->item_factors = sec[AFF_SEC_ITEM_FACTORS];
	v->seen_ptr = sec[AFF_SEC_SEEN_PTR];
	v->seen_items = sec[AFF_SEC_SEEN_ITEMS];
	v->seen_weights = sec[AFF_SEC_SEEN_WEIGHTS];
	v->popularity = sec[AFF_SEC_POPULARITY];
	v->loss = sec[AFF_SEC_LOSS];
	v->sweep_seconds = sec[AFF_SEC_SWEEP_SECONDS];
	v->n_sweeps = (int64_t) cnt[AFF_SEC_LOSS];
	v->neighbor_count = cnt[AFF_SEC_NEIGHBOR_IDX];
	return AFF_OK;
}

/* Elements a content scan handles between two looks at its poll budget. */
#define SCAN_BLOCK 65536

/* 1 when k[0..n) is strictly ascending, 0 when not, -1 when cancelled. */
static int
strictly_ascending(const int64_t *k, int64_t n, Poller *p)
{
	int64_t		i;

	for (i = 1; i < n; i++)
	{
		if (k[i] <= k[i - 1])
			return 0;
		if ((i % SCAN_BLOCK) == 0 && poll_due(p, SCAN_BLOCK * sizeof(int64_t)))
			return -1;
	}
	return 1;
}

/* Index of the first non-finite value, -1 when none, -2 when cancelled. */
static int64_t
first_non_finite_f(const float *x, uint64_t n, Poller *p)
{
	uint64_t	i;

	for (i = 0; i < n; i++)
	{
		if (!isfinite(x[i]))
			return (int64_t) i;
		if ((i % SCAN_BLOCK) == 0 && i > 0 && poll_due(p, SCAN_BLOCK * sizeof(float)))
			return -2;
	}
	return -1;
}

static AffStatus
check_options(const AffModelHeader *h, AffError *err)
{
	const AffMethod *meth = aff_method_by_code(h->method);

	if (!isfinite(h->regularization) || h->regularization < 0 ||
		!isfinite(h->alpha) || h->alpha < 0 ||
		!isfinite(h->epsilon) || h->epsilon <= 0 ||
		!isfinite(h->fit_seconds) || h->fit_seconds < 0)
		return corrupt(err, "Options or timings hold out-of-range numbers.", 0, 0);
	if ((meth->options & AFF_OPT_BIT(AFF_OPT_SOLVER) &&
		 h->solver != AFF_SOLVER_CG && h->solver != AFF_SOLVER_CHOLESKY) ||
		(meth->options & AFF_OPT_BIT(AFF_OPT_CONFIDENCE) &&
		 h->confidence != AFF_CONFIDENCE_LINEAR && h->confidence != AFF_CONFIDENCE_LOG))
		return corrupt(err, "Unknown solver %llu or confidence %llu.",
					   (uint64_t) h->solver, (uint64_t) h->confidence);
	return AFF_OK;
}

/*
 * The content checks that the structural view leaves out, calling the
 * poller's callback every AFF_POLL_BYTES or so of the bytes scanned.
 */
static AffStatus
check_content(const AffModelView *v, Poller *p, AffError *err)
{
	const AffModelHeader *h = v->h;
	int64_t		u;
	int64_t		j;
	int64_t		bad;
	int			asc;

	if ((asc = strictly_ascending(v->user_keys, h->n_users, p)) == 1)
		asc = strictly_ascending(v->item_keys, h->n_items, p);
	if (asc < 0)
		return poller_cancelled(err);
	if (asc == 0)
		return corrupt(err, "A key dictionary is not strictly ascending (%llu users, %llu items).",
					   (uint64_t) h->n_users, (uint64_t) h->n_items);
	if (v->seen_ptr[0] != 0 || v->seen_ptr[h->n_users] != h->nnz)
		return corrupt(err, "Training list offsets run from %llu to %llu.",
					   (uint64_t) v->seen_ptr[0], (uint64_t) v->seen_ptr[h->n_users]);
	for (u = 0; u < h->n_users; u++)
	{
		if (v->seen_ptr[u + 1] < v->seen_ptr[u] || v->seen_ptr[u + 1] > h->nnz)
			return corrupt(err, "Training list offsets decrease or run past the end at user index %llu.",
						   (uint64_t) u, 0);
		for (j = v->seen_ptr[u]; j < v->seen_ptr[u + 1]; j++)
		{
			int32_t		i = v->seen_items[j];

			if (i < 0 || i >= h->n_items ||
				(j > v->seen_ptr[u] && i <= v->seen_items[j - 1]))
				return corrupt(err, "Training item index %llu of user index %llu is out of range or order.",
							   (uint64_t) (int64_t) i, (uint64_t) u);
			if (!(v->seen_weights[j] > 0) || !isfinite(v->seen_weights[j]))
				return corrupt(err, "Training weight %llu of user index %llu is not a positive number.",
							   (uint64_t) j, (uint64_t) u);
		}
		/* the user's offset, items and weights */
		if (poll_due(p, 8 + 8 * (uint64_t) (v->seen_ptr[u + 1] - v->seen_ptr[u])))
			return poller_cancelled(err);
	}
	for (j = 0; j < h->n_items; j++)
	{
		if (!(v->popularity[j] >= 0) || !isfinite(v->popularity[j]))
			return corrupt(err, "Popularity of item index %llu is not a finite non-negative number.",
						   (uint64_t) j, 0);
		if ((j % SCAN_BLOCK) == 0 && poll_due(p, SCAN_BLOCK * sizeof(float)))
			return poller_cancelled(err);
	}
	for (j = 0; j < v->n_sweeps; j++)
	{
		if (!isfinite(v->loss[j]) || !isfinite(v->sweep_seconds[j]))
			return corrupt(err, "Loss or timing of sweep %llu is not finite.",
						   (uint64_t) j + 1, 0);
		if ((j % SCAN_BLOCK) == 0 && poll_due(p, SCAN_BLOCK * 2 * sizeof(double)))
			return poller_cancelled(err);
	}
	if (v->user_factors != NULL && v->item_factors != NULL)
	{
		uint64_t	f = (uint64_t) h->factors;

		if ((bad = first_non_finite_f(v->user_factors, f * h->n_users, p)) == -2)
			return poller_cancelled(err);
		if (bad >= 0)
			return corrupt(err, "User factor %llu of user index %llu is not finite.",
						   (uint64_t) bad % f, (uint64_t) bad / f);
		if ((bad = first_non_finite_f(v->item_factors, f * h->n_items, p)) == -2)
			return poller_cancelled(err);
		if (bad >= 0)
			return corrupt(err, "Item factor %llu of item index %llu is not finite.",
						   (uint64_t) bad % f, (uint64_t) bad / f);
	}
	/* each side's texts are hashed in one call, a poll after each */
	if (aff_keys_side_text(h->key_type, 1))
	{
		if (aff_check_text_keys(h->text_hash_key, v->user_keys, h->n_users, v->user_text_off,
								v->user_text, v->user_text_len, "user", err) != AFF_OK)
			return err->status;
		if (poll_due(p, AFF_POLL_BYTES))
			return poller_cancelled(err);
	}
	if (aff_keys_side_text(h->key_type, 0))
	{
		if (aff_check_text_keys(h->text_hash_key, v->item_keys, h->n_items, v->item_text_off,
								v->item_text, v->item_text_len, "item", err) != AFF_OK)
			return err->status;
		if (poll_due(p, AFF_POLL_BYTES))
			return poller_cancelled(err);
	}
	if (v->item_weights != NULL)
	{
		uint64_t	n = (uint64_t) h->n_items * (uint64_t) h->n_items;

		if ((bad = first_non_finite_f(v->item_weights, n, p)) == -2)
			return poller_cancelled(err);
		if (bad >= 0)
			return corrupt(err, "Item weight %llu of item index %llu is not finite.",
						   (uint64_t) bad % h->n_items, (uint64_t) bad / h->n_items);
	}
	if (v->neighbor_ptr != NULL)
	{
		int64_t		total = (int64_t) (v->neighbor_ptr[h->n_items]);

		if (v->neighbor_ptr[0] != 0 || total < 0 ||
			(uint64_t) total != v->neighbor_count)
			return corrupt(err, "Neighbour offsets run from %llu to %llu.",
						   (uint64_t) v->neighbor_ptr[0], (uint64_t) total);
		for (j = 0; j < h->n_items; j++)
		{
			int64_t		k;

			if (v->neighbor_ptr[j + 1] < v->neighbor_ptr[j] || v->neighbor_ptr[j + 1] > total)
				return corrupt(err, "Neighbour offsets decrease or run past the end at item index %llu.",
							   (uint64_t) j, 0);
			for (k = v->neighbor_ptr[j]; k < v->neighbor_ptr[j + 1]; k++)
				if (v->neighbor_idx[k] < 0 || v->neighbor_idx[k] >= h->n_items ||
					v->neighbor_idx[k] == j || !isfinite(v->neighbor_sim[k]))
					return corrupt(err, "Neighbour %llu of item index %llu is out of range or not finite.",
								   (uint64_t) k, (uint64_t) j);
			if (poll_due(p, 8 + 8 * (uint64_t) (v->neighbor_ptr[j + 1] - v->neighbor_ptr[j])))
				return poller_cancelled(err);
		}
	}
	{
		const AffMethod *meth = aff_method_by_code(h->method);

		if (meth->check_content != NULL)
			return meth->check_content(v, p->fn, p->arg, err);
	}
	return check_options(h, err);
}

/*
 * Full validation of len bytes at buf; fills *v on success.  Polls between
 * chunks of the checksum and of the content scan (poll may be NULL) and
 * returns AFF_ERR_CANCELLED when it asks to stop.
 */
AffStatus
aff_model_validate_polled(const uint8_t *buf, uint64_t len, AffModelView *v,
						  AffPollFn poll, void *poll_arg, AffError *err)
{
	AffStatus	st = aff_model_view(buf, len, v, err);
	Poller		p;
	uint64_t	sum;

	if (st != AFF_OK)
		return st;
	if (aff_model_checksum_polled(buf, len, poll, poll_arg, &sum, err) != AFF_OK)
		return err->status;
	if (sum != v->h->checksum)
	{
		aff_fail(err, AFF_ERR_CORRUPT, "affinity.model checksum mismatch");
		return aff_detail(err, "The value's bytes do not match the checksum in its header; it was damaged or altered.");
	}
	poller_init(&p, poll, poll_arg);
	return check_content(v, &p, err);
}

/* Full validation of len bytes at buf, in one go; fills *v on success. */
AffStatus
aff_model_validate(const uint8_t *buf, uint64_t len, AffModelView *v, AffError *err)
{
	return aff_model_validate_polled(buf, len, v, NULL, NULL, err);
}
