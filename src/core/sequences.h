/*
 * sequences.h
 *		Ordered events (sequence, position, item) and what is built from
 *		them: the sequential rules of a model value of method
 *		sequential_rules (method_sequences.c).
 *
 * A sequence is an order, a session or a customer; the position orders its
 * events (a timestamp or a number, as an int64).  Events at the same
 * position of one sequence form one step (a basket): they are not ordered
 * among themselves.  Steps are numbered by distinct position within the
 * sequence, and the distance of two events is the difference of their step
 * numbers, so the order in which rows arrive never matters.
 *
 * A rules value has no users and no training pairs (n_users = nnz = 0);
 * it holds the item keys, the popularity of each item (sequences holding
 * it), the section sequence_info, and the rules as CSR by item in the
 * neighbour sections (neighbor_ptr, neighbor_idx, neighbor_sim): the
 * successors of item p with their weights, heaviest first.
 */
#ifndef AFF_SEQUENCES_H
#define AFF_SEQUENCES_H

#include "aff_core.h"
#include "model_format.h"

/* One event; keys are int64 (bigint, or SipHash values of texts). */
typedef struct AffEvent
{
	int64_t		seq;
	int64_t		pos;
	int64_t		item;
} AffEvent;

/* The fields of the sequence_info section (int64 each). */
#define AFF_SINFO_WINDOW		0	/* steps within which a pair makes a rule */
#define AFF_SINFO_SUCCESSORS	1	/* successors kept per item, at most */
#define AFF_SINFO_SEQUENCES		2	/* distinct sequences */
#define AFF_SINFO_ONE_STEP		3	/* sequences of one step: no transition */
#define AFF_SINFO_EVENTS		4	/* events after repeats were merged */
#define AFF_SINFO_STEPS			5	/* steps over all sequences */
#define AFF_SINFO_PAIRS			6	/* (earlier, later) pairs of events counted */
#define AFF_SINFO_RULES			7	/* distinct (item, successor) pairs */
#define AFF_SINFO_KEPT			8	/* of them kept (the neighbour count) */
#define AFF_SINFO_POSITION		9	/* AFF_POSITION_*: what the positions were */
#define AFF_SINFO_COUNT			12	/* the section's length; the rest is zero */

#define AFF_POSITION_NUMBER		1
#define AFF_POSITION_TIMESTAMP	2
#define AFF_POSITION_TIMESTAMPTZ 3

/* Bounds of the options (method.c's table uses them too). */
#define AFF_MAX_WINDOW			1000
#define AFF_MAX_SUCCESSORS		100000

typedef struct AffSeqParams
{
	int			window;
	int			successors;
	int			position_type;	/* AFF_POSITION_* */
	double		memory_limit;	/* bytes the build may hold, 0 = no limit */
	double		held_bytes;		/* what the caller holds already (the events, texts) */
	AffPollFn	poll;
	void	   *poll_arg;
} AffSeqParams;

typedef struct AffSeqBuild
{
	int64_t		n_items;
	int64_t	   *item_keys;
	int64_t		repeats_merged; /* events repeated at one step of a sequence */
} AffSeqBuild;

/*
 * Build the rules from n events (sorted and rewritten in place).  Fills
 * the header's counts, the item keys, popularity, sequence_info and the
 * neighbour sections in parts (which the caller cleared); the caller adds
 * item texts for text keys.
 */
extern AffStatus aff_sequences_build(AffEvent *ev, int64_t n, const AffSeqParams *p,
									 const AffAllocator *a, AffModelParts *parts,
									 AffSeqBuild *out, AffError *err);

/*
 * Bytes the build needs besides the events for n events, before the rules
 * it keeps (which it checks against memory_limit as they grow).
 */
extern double aff_sequences_build_bytes(int64_t n);

extern const char *aff_position_name(int code);

#endif							/* AFF_SEQUENCES_H */
