/*
 * digest_driver.c
 *		Runs the engine's SHA-256 and base64 codec (src/core/digest.c) on
 *		records read from stdin, for tests/check_digest.py.
 *
 * Each record is one operation byte ('s' SHA-256, 'e' encode, 'd' decode,
 * 'i' SHA-256 fed in pieces of the given sizes), a little-endian uint64
 * length and that many bytes.  Answers: 's'/'i' the 32-byte digest; 'e' a
 * uint64 length and the text; 'd' an int64 result, a uint64 offset of the
 * bad character (when the result is -1) and the decoded bytes.
 *
 * With AFFINITY_SHA256_PORTABLE=1 in the environment every hash uses the
 * portable compression function instead of the one chosen for the CPU.
 * "digest_driver --implementation" prints the name of the compression it
 * would use ("sha-ni" or "portable") and exits.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "../../src/core/digest.h"

/* Read exactly n bytes from stdin; 0 on a short read. */
static int
read_all(void *p, size_t n)
{
	return fread(p, 1, n, stdin) == n;
}

/* Read records from stdin and answer each on stdout (see above). */
int
main(int argc, char **argv)
{
	int			op;
	const char *portable = getenv("AFFINITY_SHA256_PORTABLE");

	if (portable != NULL && strcmp(portable, "1") == 0)
		aff_sha256_force_portable(1);
	if (argc == 2 && strcmp(argv[1], "--implementation") == 0)
	{
		printf("%s\n", aff_sha256_implementation());
		return 0;
	}
	while ((op = getchar()) != EOF)
	{
		uint64_t	len;
		uint8_t    *data;

		if (!read_all(&len, 8))
			return 2;
		data = malloc(len + 1);
		if (data == NULL || !read_all(data, len))
			return 2;
		if (op == 's')
		{
			uint8_t		d[AFF_SHA256_BYTES];

			aff_sha256(data, len, d);
			fwrite(d, 1, sizeof(d), stdout);
		}
		else if (op == 'i')
		{
			/* pieces of 1, 2, 3, ... 70 bytes, then again, to cross block edges */
			AffSha256	s;
			uint8_t		d[AFF_SHA256_BYTES];
			uint64_t	off = 0;
			size_t		piece = 1;

			aff_sha256_init(&s);
			while (off < len)
			{
				size_t		take = len - off < piece ? (size_t) (len - off) : piece;

				aff_sha256_update(&s, data + off, take);
				off += take;
				piece = piece % 70 + 1;
			}
			aff_sha256_final(&s, d);
			fwrite(d, 1, sizeof(d), stdout);
		}
		else if (op == 'e')
		{
			uint64_t	n = aff_b64_encoded_len(len);
			char	   *out = malloc(n + 1);

			aff_b64_encode(data, len, out);
			fwrite(&n, 1, 8, stdout);
			fwrite(out, 1, n, stdout);
			free(out);
		}
		else if (op == 'd')
		{
			size_t		cap = aff_b64_decoded_max(len);
			uint8_t    *out = malloc(cap + 1);
			size_t		bad = 0;
			int64_t		n = aff_b64_decode((const char *) data, len, out, &bad);
			uint64_t	bad64 = bad;

			fwrite(&n, 1, 8, stdout);
			fwrite(&bad64, 1, 8, stdout);
			if (n > 0)
				fwrite(out, 1, (size_t) n, stdout);
			free(out);
		}
		else
			return 2;
		free(data);
	}
	return 0;
}
