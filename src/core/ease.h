/*
 * ease.h
 *		EASE: a closed-form item-item weight matrix (Steck 2019,
 *		"Embarrassingly Shallow Autoencoders for Sparse Data", WWW 2019).
 *
 * The fit runs in three steps, each of which polls for a stop request:
 *		aff_ease_gram		G = X^T X + lambda I for the binary matrix X
 *		aff_ease_invert		P = G^-1 in place (Cholesky, double precision)
 *		aff_ease_weights	B = I - P diag(1 / diag P), then diag(B) = 0
 * The caller allocates G (n x n doubles) and B (n x n floats).
 */
#ifndef AFF_EASE_H
#define AFF_EASE_H

#include "aff_core.h"
#include "interactions.h"

/* Bytes of the two n x n work matrices, or 0 when that overflows size_t. */
extern size_t aff_ease_work_bytes(int64_t n_items);

extern AffStatus aff_ease_gram(const AffMatrix *m, double lambda, int threads,
							   double *G, AffPollFn poll, void *poll_arg,
							   AffError *err);
extern AffStatus aff_ease_invert(double *G, int64_t n, int threads,
								 double lambda, AffPollFn poll, void *poll_arg,
								 AffError *err);
extern AffStatus aff_ease_weights(const double *P, int64_t n, int threads,
								  float *B, AffPollFn poll, void *poll_arg,
								  AffError *err);

#endif							/* AFF_EASE_H */
