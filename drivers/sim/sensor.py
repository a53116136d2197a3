"""The simulated image sensor: the linear camera model of EMVA Standard 1288 (Release 4.0).

Per pixel, with mu_p mean photons in the exposure, in the order the signal meets them:

    electrons   e  = Poisson(QE * mu_p * (1 + PRNU_pattern) + dark_current * t_exp)
                     (Gaussian with variance = mean above 20 e-, where the two agree)
    full well   e  = min(e, full_well)                 (the pixel's charge saturates)
    readout     e += read_noise * N(0, 1) + DSNU_pattern   (after the well: read noise is
                     added by the readout chain, so it stays when the pixel is full)
    digital     y  = clip(round(K * e + dark_offset), 0, 2^bits - 1),  K = K0 * 10^(gain_dB / 20)

so mean and temporal variance follow EMVA 1288's mu_y = mu_y.dark + K * eta * mu_p and
sigma_y^2 = K^2 * sigma_d^2 + sigma_q^2 + K * (mu_y - mu_y.dark), sigma_q^2 = 1/12 DN^2, below
saturation. At full-well saturation the shot noise is gone and sigma_y^2 = K^2 * sigma_read^2 +
sigma_q^2 remains (the readout's own noise); only where the ADC clips first (K * full_well +
dark_offset > 2^bits - 1) does the temporal noise vanish. Read noise is input-referred
(electrons) and the black level is added after the gain. The fixed patterns (PRNU, DSNU) are
white and deterministic from the seed.
"""

from __future__ import annotations

import math

import numpy as np

from drivers.sim.config import SimSensor

POISSON_BELOW_E = 20.0


class Sensor:
    def __init__(self, cfg: SimSensor, shape: tuple[int, int], bit_depth: int, seed: int) -> None:
        self.cfg = cfg
        self.shape = shape
        self.bit_depth = bit_depth
        self.max_dn = (1 << bit_depth) - 1
        self.dtype = np.uint8 if bit_depth <= 8 else np.uint16
        rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, 0x5E2])
        prnu = 1.0 + cfg.prnu_fraction * rng.standard_normal(shape, dtype=np.float32)
        self.dsnu_pattern_e = (cfg.dsnu_e * rng.standard_normal(shape, dtype=np.float32)).astype(np.float32)
        # Photons -> mean electrons in one multiply.
        self._qe_prnu = (cfg.quantum_efficiency * prnu).astype(np.float32)

    @property
    def prnu_pattern(self) -> np.ndarray:
        """Relative photo-response of each pixel (mean ~1, std = prnu_fraction)."""
        return self._qe_prnu / np.float32(self.cfg.quantum_efficiency)

    def system_gain(self, gain_db: float) -> float:
        return self.cfg.system_gain_dn_per_e * 10.0 ** (gain_db / 20.0)

    def truth_at(self, gain_db: float = 0.0) -> dict[str, float]:
        """The constants a photon-transfer characterisation should recover, at this gain."""
        c = self.cfg
        k = self.system_gain(gain_db)
        saturation_e = min(c.full_well_e, (self.max_dn - c.dark_offset_dn) / k)
        return {
            "gain_db": float(gain_db),
            "system_gain_dn_per_e": k,
            "quantum_efficiency": c.quantum_efficiency,
            "read_noise_e": c.read_noise_e,
            "read_noise_dn": k * c.read_noise_e,
            "dark_current_e_per_s": c.dark_current_e_per_s,
            "dark_offset_dn": c.dark_offset_dn,
            "dsnu_e": c.dsnu_e,
            "dsnu_dn": k * c.dsnu_e,
            "prnu_fraction": c.prnu_fraction,
            "full_well_e": c.full_well_e,
            "saturation_e": saturation_e,
            "saturation_dn": float(min(self.max_dn, round(k * c.full_well_e + c.dark_offset_dn))),
            "bit_depth": float(self.bit_depth),
            "quantisation_noise_dn": 1.0 / math.sqrt(12.0),
        }

    def expose(self, photons: np.ndarray, *, exposure_ms: float, gain_db: float, rng: np.random.Generator) -> np.ndarray:
        """Digital frame for mean photon counts per pixel ``photons`` (float32, frame shape)."""
        if photons.shape != self.shape:
            raise ValueError(f"photon map is {photons.shape}, sensor is {self.shape}")
        c = self.cfg
        mean_e = photons * self._qe_prnu
        mean_e += np.float32(c.dark_current_e_per_s * exposure_ms / 1000.0)
        noise = rng.standard_normal(self.shape, dtype=np.float32)
        # Shot and read noise in one Gaussian where Poisson is near-Gaussian (variances add), which
        # is exact wherever the well cannot fill; read noise comes after the well, so pixels that
        # may reach it (within 6 sigma of shot noise) are drawn in order below.
        read = np.float32(c.read_noise_e)
        e = mean_e + read * read
        np.sqrt(e, out=e)
        e *= noise
        e += mean_e
        full = np.float32(c.full_well_e)
        near_full = mean_e > full - 6.0 * np.sqrt(full)
        if near_full.any():
            m = mean_e[near_full]
            shot = m + np.sqrt(m) * noise[near_full]
            e[near_full] = np.minimum(shot, full) + read * rng.standard_normal(m.shape, dtype=np.float32)
        dim = mean_e < POISSON_BELOW_E
        if dim.any():
            e[dim] = np.minimum(rng.poisson(mean_e[dim]).astype(np.float32), full) + read * noise[dim]
        del noise, mean_e
        e += self.dsnu_pattern_e
        dn = e  # electrons -> DN in place
        dn *= np.float32(self.system_gain(gain_db))
        dn += np.float32(c.dark_offset_dn)
        np.rint(dn, out=dn)
        np.clip(dn, 0.0, float(self.max_dn), out=dn)
        return dn.astype(self.dtype)
