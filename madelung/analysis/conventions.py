"""The named Madelung-constant conventions, in words: one line each, shared by the computation
(:mod:`madelung.analysis.madelung_constants`) and the reports, and light to import (the command
line declares and checks its options without loading the sums).

References
----------
E. Madelung, *Das elektrische Feld in Systemen von regelmäßig angeordneten Punktladungen*,
Phys. Z. 19 (1918) 524 (the constant); the conventions are those named in
:mod:`madelung.analysis.madelung_constants`.
"""

CONVENTION_TEXT = {
    "charges_left_in": "E_fu = -M k_e / r0 (ion charges inside M)",
    "handbook": "E_fu = -M z+ |z-| k_e / r0 (one cation and one anion kind)",
    "common_factor": "E_fu = -M Z^2 k_e / r0 (Z: highest common factor of the charges)",
    "site": "M_i = -phi_i r0 / (k_e q_i) (site potential in units of k_e q_i / r0)",
}
