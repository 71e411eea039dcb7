"""Index layout of the compiled filter: the parameter vector, the two modes, the error state and the
packed covariance. The kernels read ``prm`` by these names only; :func:`recon.estimate.run.filter_params`
fills it from a :class:`recon.estimate.types.NoiseModel`.
"""

from __future__ import annotations

# Indices into the parameter vector ``prm`` (a plain float array, N_PRM long):
P_SV = 0  # gyro angle random walk sv, rad/sqrt(s)
P_SU = 1  # gyro bias rate random walk su, rad/s/sqrt(s)
P_ACC = 2  # rms angular acceleration while a gyro sample is held, rad/s^2
P_HNOM = 3  # nominal gyro interval h, s
P_TAUF = 4  # correlation time of the field-model error tau_f, s (0: white)
P_SIGF = 5  # steady 1-sigma of the field-model error per GCRF axis sig_f, nT
P_SIGM = 6  # magnetometer white noise sig_m, nT
P_SIGTAU = 7  # white unmodelled torque, N m sqrt(s)
P_MU = 8  # Earth's gravitational parameter, m^3/s^2
P_J = 9  # inertia J (3 x 3, row by row), kg m^2: P_J .. P_J + 8
P_JINV = 18  # its inverse, row by row: P_JINV .. P_JINV + 8
P_TAUREL = 27  # relative 1-sigma error of the coil torque
N_PRM = 28

MODE_GYRO, MODE_DYNAMICS = 0, 1
N = 9  # error-state size: attitude (3), gyro bias or body rate (3), field-model error (3)
NP = N * (N + 1) // 2  # stored covariances keep the upper triangle only, row by row (45 numbers)
