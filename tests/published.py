"""Published values that several test modules check against, each cited in full here once.

Not a test module (pytest collects only ``test_*.py``); tests import it as ``published``.
"""

#: Faint-galaxy number-count slopes d log10 N / dm fitted over 20 < m_AB < 24: 0.35 ± 0.02 in
#: I_AB and 0.47 ± 0.02 in B_AB (McCracken, Le Fèvre, Brodwin et al. 2001, A&A 376, 756,
#: section 4.1, "I_AB- and B_AB-selected galaxy counts"). The range spans both bands with
#: their 1 sigma errors. It is for B and I: no r-band slope is given there, and an r-band
#: slope is expected between the two (r lies between B and I in wavelength; an interpolation,
#: not a measurement), which is how the tests use it for the r-band demo survey.
FAINT_GALAXY_SLOPE_B_TO_I = (0.33, 0.49)
