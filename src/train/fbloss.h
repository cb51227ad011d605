/* The forward-backward losses on one batch, with their gradients.
 *
 * The successor measure of policy π satisfies M(s,a,·) = P(·|s,a) + γ E[M(s',π(s'),·)]
 * (Touati & Ollivier, NeurIPS 2021: the Bellman equation for successor measures). Writing
 * M(s,a,ds') ≈ F(s,a)ᵀB(s') ρ(ds') with ρ the distribution of next states in the data and
 * measuring the error in L²(ρ) gives, up to
 * a constant that does not depend on F or B, the temporal-difference loss (ibid.; Touati,
 * Rapin & Ollivier, ICLR 2023, the FB loss; section references from memory):
 *
 *   L = ½ E_{(s,a,s⁺)~D, s'~ρ}[(F(s,a)ᵀB(s') − γ F̄(s⁺,π(s⁺))ᵀB̄(s'))²] − E_{(s,a,s⁺)~D}[F(s,a)ᵀB(s⁺)].
 *
 * The second term is the transition's own next state s⁺ "as the target": expanding the square
 * of (M − P/ρ − γPπM) the cross term −2⟨M, P/ρ⟩_ρ equals −2 E[F(s,a)ᵀB(s⁺)] exactly, so it
 * is computed algebraically from the pairs actually observed, never by sampling targets.
 * On a batch of n transitions with B_j = B(s⁺_j) standing for samples of ρ, the estimator used
 * here (unbiased: each pair i ≠ j has independent s' for transition i) is
 *
 *   L_FB = 1/(2n(n−1)) Σ_{i≠j} (F_iᵀB_j − γ c_i F̄_iᵀB̄_j)² − (1/n) Σ_i F_iᵀB_i,
 *
 * with c_i = 0 when transition i ended its episode (no successor after a true terminal state)
 * and 1 otherwise. The diagonal pairs are left out of the square because B_i is the very next
 * state of transition i, not an independent draw of ρ.
 *
 * Orthonormality regulariser (ICLR 2023, §3): ||E_ρ[BBᵀ] − I||²_F = tr(Σ²) − 2 tr Σ + d with
 * Σ = E[BBᵀ]; tr(Σ²) = E_{s≠s'}[(B(s)ᵀB(s'))²] over independent pairs, so its unbiased batch
 * estimate is
 *
 *   L_orth = 1/(n(n−1)) Σ_{i≠j} (B_iᵀB_j)² − (2/n) Σ_i B_iᵀB_i + d.
 *
 * Prefix veer__fb_. */
#ifndef VEER_TRAIN_FBLOSS_H
#define VEER_TRAIN_FBLOSS_H

#include <stddef.h>
#include <stdint.h>

/* L_FB for n >= 2 rows of width d. F, B: online outputs; Ft: target F̄ at the next state and
 * next action; Bt: target B̄ at the next states; cont: n values c_i (NULL: all 1).
 * Writes dL/dF to dF (n x d) and ADDS dL/dB to dB (n x d). work: 2 n² floats.
 * Returns L_FB; *offdiag and *diag (may be NULL) receive its two terms. */
double veer__fb_loss(size_t n, uint32_t d, const float *F, const float *B, const float *Ft,
                     const float *Bt, float discount, const float *cont, float *dF, float *dB,
                     float *work, double *offdiag, double *diag);

/* coef * L_orth for n >= 2 rows of B; ADDS its gradient to dB. work: n² floats.
 * Returns L_orth (without coef). */
double veer__fb_orth(size_t n, uint32_t d, const float *B, float coef, float *dB, float *work);

#endif
