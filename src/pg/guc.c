/*
 * guc.c
 *		Module load: the affinity.* settings, and affinity.runtime().
 */
#include "affinity_pg.h"

#include <cblas.h>
#include <dlfcn.h>
#include <limits.h>
#include <sys/stat.h>
#include <unistd.h>

#include "lib/stringinfo.h"
#include "miscadmin.h"
#include "utils/guc.h"
#include "utils/json.h"

#include "../core/blas_pool.h"
#include "../core/parallel.h"

PG_MODULE_MAGIC;

int			affinity_threads = 0;
int			affinity_max_threads = 0;
int			affinity_factors = 64;
int			affinity_iterations = 15;
double		affinity_regularization = -1.0;
double		affinity_alpha = 10.0;
int			affinity_max_fit_memory_mb = 8192;
bool		affinity_verbose = false;

/*
 * Which file this process loaded the library from: device, inode, size and
 * modification time of the shared object, mixed, taken when it is loaded.
 * A parallel worker loads the library anew; when the file was installed
 * again since the leader loaded it, the worker runs another build, and
 * partial states of affinity.fit carry this tag so the leader refuses them
 * with a clear error instead of misreading them (fit_agg.c).  0 when the
 * file cannot be found.
 */
uint64		affinity_library_tag = 0;

static void
note_library_file(void)
{
	Dl_info		info;
	struct stat sb;
	uint64		h = 0x9e3779b97f4a7c15ULL;
	uint64		parts[5];
	int			i;

	/*
	 * The address of a symbol of our own, not _PG_init: an exported name
	 * may resolve to another library's (every module has a _PG_init).
	 */
	if (dladdr((void *) &affinity_library_tag, &info) == 0 || info.dli_fname == NULL ||
		stat(info.dli_fname, &sb) != 0)
		return;
	parts[0] = (uint64) sb.st_dev;
	parts[1] = (uint64) sb.st_ino;
	parts[2] = (uint64) sb.st_size;
	parts[3] = (uint64) sb.st_mtim.tv_sec;
	parts[4] = (uint64) sb.st_mtim.tv_nsec;
	for (i = 0; i < 5; i++)
	{
		h ^= parts[i];
		h *= 0xbf58476d1ce4e5b9ULL;
		h ^= h >> 31;
	}
	affinity_library_tag = h;
}

void
_PG_init(void)
{
	note_library_file();
	DefineCustomIntVariable("affinity.threads",
							"Worker threads for a fit; 0 means all online CPUs.",
							"Capped by affinity.max_threads.",
							&affinity_threads, 0, 0, 1024,
							PGC_USERSET, 0, NULL, NULL, NULL);
	DefineCustomIntVariable("affinity.max_threads",
							"Upper bound on worker threads of one fit; 0 means the number of online CPUs.",
							NULL,
							&affinity_max_threads, 0, 0, 1024,
							PGC_SUSET, 0, NULL, NULL, NULL);
	DefineCustomIntVariable("affinity.factors",
							"Default latent dimension of implicit_als fits.",
							NULL,
							&affinity_factors, 64, 1, AFF_MAX_FACTORS,
							PGC_USERSET, 0, NULL, NULL, NULL);
	DefineCustomIntVariable("affinity.iterations",
							"Default number of alternating sweeps of implicit_als fits.",
							NULL,
							&affinity_iterations, 15, 1, 10000,
							PGC_USERSET, 0, NULL, NULL, NULL);
	DefineCustomRealVariable("affinity.regularization",
							 "Default L2 penalty (lambda); -1 means the method's own default.",
							 NULL,
							 &affinity_regularization, -1.0, -1.0, 1e12,
							 PGC_USERSET, 0, NULL, NULL, NULL);
	DefineCustomRealVariable("affinity.alpha",
							 "Default confidence scale: c = 1 + alpha * f(w).",
							 NULL,
							 &affinity_alpha, 10.0, 0.0, 1e12,
							 PGC_USERSET, 0, NULL, NULL, NULL);
	DefineCustomIntVariable("affinity.max_fit_memory",
							"A fit whose estimated memory exceeds this stops before allocating.",
							"Only superusers can change it, so it bounds every role's fits.",
							&affinity_max_fit_memory_mb, 8192, 1, INT_MAX,
							PGC_SUSET, GUC_UNIT_MB, NULL, NULL, NULL);
	DefineCustomIntVariable("affinity.model_cache_size",
							"Memory for models kept decoded between calls in one backend.",
							"Least recently used models are dropped first; the model in use always stays.",
							&affinity_model_cache_size_mb, 256, 0, INT_MAX,
							PGC_USERSET, GUC_UNIT_MB, NULL, NULL, NULL);
	DefineCustomBoolVariable("affinity.verbose",
							 "Report each sweep of a fit as a NOTICE.",
							 NULL,
							 &affinity_verbose, false,
							 PGC_USERSET, 0, NULL, NULL, NULL);
	MarkGUCPrefixReserved("affinity");

	/*
	 * BLAS runs single-threaded except inside a fit's Gram products.  The
	 * pool OpenBLAS started when it was loaded is replaced by one started
	 * with every signal blocked (blas_pool.c); a postmaster that preloads
	 * the library starts no threads, its backends do so on their first fit.
	 */
	openblas_set_num_threads(1);
	if (IsUnderPostmaster)
		aff_blas_pool_prepare(resolve_threads(affinity_threads));
}

/*
 * Threads for a fit: 0 means all online CPUs; the result is capped by
 * affinity.max_threads (0 = online CPUs) and by the number of threads that
 * may call OpenBLAS at once (aff_blas_max_callers: its table of work
 * buffers; see DEVELOPERS.md, "Threads").  Called on the backend's thread
 * before every fit, so it also grows OpenBLAS's pool, signals blocked, to
 * the threads that fit's Gram products will ask for.
 */
int
resolve_threads(int requested)
{
	int			cpus = aff_online_cpus();
	int			cap = affinity_max_threads > 0 ? affinity_max_threads : cpus;
	int			n = requested > 0 ? requested : cpus;

	if (n > cap)
		n = cap;
	if (n > aff_blas_max_callers())
		n = aff_blas_max_callers();
	aff_blas_pool_prepare(n);
	return n;
}

static void
append_cpu_features(StringInfo s)
{
	const char *names[] = {"sse4.2", "avx", "avx2", "fma", "avx512f"};
	int			have[5];
	bool		first = true;
	int			i;

	__builtin_cpu_init();
	have[0] = __builtin_cpu_supports("sse4.2");
	have[1] = __builtin_cpu_supports("avx");
	have[2] = __builtin_cpu_supports("avx2");
	have[3] = __builtin_cpu_supports("fma");
	have[4] = __builtin_cpu_supports("avx512f");
	appendStringInfoString(s, "[");
	for (i = 0; i < 5; i++)
	{
		if (!have[i])
			continue;
		appendStringInfo(s, "%s\"%s\"", first ? "" : ", ", names[i]);
		first = false;
	}
	appendStringInfoString(s, "]");
}

PG_FUNCTION_INFO_V1(affinity_runtime);

/*
 * affinity.runtime() -> jsonb: version, BLAS library and the kernel it
 * chose (a generic kernel on some virtual machines is several times slower),
 * thread settings and CPU features.
 */
Datum
affinity_runtime(PG_FUNCTION_ARGS)
{
	StringInfoData s;

	initStringInfo(&s);
	appendStringInfo(&s, "{\"version\": \"%s\", \"format_version\": %d, ",
					 AFFINITY_VERSION, AFF_FORMAT_VERSION);
	appendStringInfoString(&s, "\"blas\": \"OpenBLAS\", \"blas_core\": ");
	escape_json(&s, openblas_get_corename());
	appendStringInfoString(&s, ", \"blas_config\": ");
	escape_json(&s, openblas_get_config());
	appendStringInfo(&s, ", \"blas_threads_outside_fits\": %d, ", openblas_get_num_threads());
	appendStringInfo(&s, "\"online_cpus\": %d, \"threads\": %d, \"max_threads\": %d, "
					 "\"fit_threads\": %d, \"cpu_features\": ",
					 aff_online_cpus(), affinity_threads, affinity_max_threads,
					 resolve_threads(affinity_threads));
	append_cpu_features(&s);
	{
		int			n;
		int64		bytes;
		int64		hits;
		int64		loads;

		cache_stats(&n, &bytes, &hits, &loads);
		appendStringInfo(&s, ", \"model_cache\": {\"entries\": %d, \"bytes\": " INT64_FORMAT
						 ", \"hits\": " INT64_FORMAT ", \"loads\": " INT64_FORMAT
						 ", \"limit_mb\": %d}",
						 n, bytes, hits, loads, affinity_model_cache_size_mb);
	}
	appendStringInfoString(&s, "}");
	PG_RETURN_JSONB_P(jsonb_from_cstring(s.data));
}
