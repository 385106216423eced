/*
 * big_value.c
 *		Write a valid popularity model value of an exact size, for the test
 *		at the size limit (tests/check_model_size_limit.py).
 *
 * Usage: big_value SIZE FILE
 * SIZE is the value's total size in bytes (a multiple of 8, as the format
 * lays sections on 8-byte boundaries); FILE receives the bytes after the
 * length word (what text input decodes).  The model: n users (ascending
 * keys 1..n) who each bought item 1, one or two items, and zero-loss
 * sweeps to reach the exact size; written by the engine's own aff_model_write and sealed
 * with its content digest.  Prints users, items, sweeps, fingerprint.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "../../src/core/digest.h"
#include "../../src/core/model_format.h"

static void
layout(AffModelParts *p, int64_t users, int64_t items, int64_t sweeps)
{
	memset(p, 0, sizeof(*p));
	p->h.method = AFF_METHOD_POPULARITY;
	p->h.key_type = AFF_KEYS_BIGINT;
	p->h.n_users = users;
	p->h.n_items = items;
	p->h.nnz = users;
	p->h.epsilon = 1.0;
	p->h.rows_read = users;
	p->count[AFF_SEC_USER_KEYS] = users;
	p->count[AFF_SEC_ITEM_KEYS] = items;
	p->count[AFF_SEC_SEEN_PTR] = users + 1;
	p->count[AFF_SEC_SEEN_ITEMS] = users;
	p->count[AFF_SEC_SEEN_WEIGHTS] = users;
	p->count[AFF_SEC_POPULARITY] = items;
	p->count[AFF_SEC_LOSS] = sweeps;
	p->count[AFF_SEC_SWEEP_SECONDS] = sweeps;
	/* non-NULL placeholders while sizing; filled in main */
	for (int k = 1; k <= AFF_SEC_SWEEP_SECONDS; k++)
		if (p->count[k] > 0 || k == AFF_SEC_LOSS || k == AFF_SEC_SWEEP_SECONDS)
			p->data[k] = p;
}

int
main(int argc, char **argv)
{
	uint64_t	target;
	AffModelParts p;
	AffError	err;
	int64_t		users = -1;
	int64_t		sweeps = 0;
	int64_t		n_items = 1;
	uint64_t	size;
	uint8_t    *buf;
	int64_t    *keys,
			   *ptr;
	int32_t    *items;
	float	   *wts;
	float		pop[2];
	int64_t		ikeys[2] = {1, 2};
	double	   *zeros;
	FILE	   *f;

	if (argc != 3)
	{
		fprintf(stderr, "usage: big_value SIZE FILE\n");
		return 2;
	}
	target = strtoull(argv[1], NULL, 10);
	/* about 24 bytes a user: search users near the estimate, items and sweeps */
	for (int64_t i = 1; i <= 2 && users < 0; i++)
		for (int64_t s = 0; s < 6 && users < 0; s++)
			for (int64_t u = (int64_t) (target / 24) - 40; u < (int64_t) (target / 24) + 40; u++)
			{
				layout(&p, u, i, s);
				if (aff_model_size(&p, &size, &err) == AFF_OK && size == target)
				{
					users = u;
					sweeps = s;
					n_items = i;
					break;
				}
			}
	if (users < 0)
	{
		fprintf(stderr, "no layout of exactly %llu bytes\n", (unsigned long long) target);
		return 1;
	}
	layout(&p, users, n_items, sweeps);
	keys = malloc(sizeof(int64_t) * users);
	ptr = malloc(sizeof(int64_t) * (users + 1));
	items = calloc(users, sizeof(int32_t));
	wts = malloc(sizeof(float) * users);
	zeros = calloc(sweeps + 1, sizeof(double));
	buf = malloc(target);
	if (!keys || !ptr || !items || !wts || !zeros || !buf)
	{
		fprintf(stderr, "out of memory\n");
		return 1;
	}
	for (int64_t u = 0; u < users; u++)
	{
		keys[u] = u + 1;
		ptr[u] = u;
		wts[u] = 1.0f;
	}
	ptr[users] = users;
	pop[0] = (float) users;
	pop[1] = 0.0f;
	p.data[AFF_SEC_USER_KEYS] = keys;
	p.data[AFF_SEC_ITEM_KEYS] = ikeys;
	p.data[AFF_SEC_SEEN_PTR] = ptr;
	p.data[AFF_SEC_SEEN_ITEMS] = items;
	p.data[AFF_SEC_SEEN_WEIGHTS] = wts;
	p.data[AFF_SEC_POPULARITY] = pop;
	p.data[AFF_SEC_LOSS] = zeros;
	p.data[AFF_SEC_SWEEP_SECONDS] = zeros;
	aff_model_write(&p, buf, target);
	aff_model_seal(buf, target);
	f = fopen(argv[2], "wb");
	if (f == NULL || fwrite(buf + 4, 1, target - 4, f) != target - 4 || fclose(f) != 0)
	{
		perror(argv[2]);
		return 1;
	}
	printf("%lld %lld %lld %016llx\n", (long long) users, (long long) n_items, (long long) sweeps,
		   (unsigned long long) ((AffModelHeader *) buf)->fingerprint);
	return 0;
}
