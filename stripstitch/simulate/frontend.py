"""Capacitive front end (simulator stage 3): finger-to-plate air gaps in, sensor codes out.

One strip sensor is modelled from physical units, in the order the signal passes through it:

1. **Sensed capacitance.** Each plate and the skin above it form a parallel-plate capacitor
   through a layered dielectric (the passivation stack, then the air gap under the skin, with an
   optional moisture film filling part of the gap): ``C = eps0 * A / sum(t_i / eps_i)``. The skin
   is treated as a grounded conductor, the usual choice in sensor models (its permittivity is of
   order 1e2-1e3 at kHz-MHz; Gabriel, Lau & Gabriel 1996, from memory).
2. **Fringing.** An optional lateral blur of the fine-grid capacitance density: a Gaussian whose
   sigma follows from the stack (:attr:`Sensor.blur_sigma_um`). The capture simulator applies it
   before integrating the density over each plate.
3. **Parasitics.** Every plate has a parasitic capacitance ``parasitic_F`` to the substrate that a
   replica (dummy) path cancels imperfectly; the residual ``parasitic_F * m`` with a per-plate
   mismatch ``m ~ N(0, replica_mismatch)`` reaches the amplifier with the signal.
4. **Charge amplifier.** A switched-capacitor charge transfer: ``V_out = (C_s + C_residual) *
   (V_H - V_M) / C_F + V_offset`` (Razavi ch. 12; Johns & Martin ch. 10).
5. **Noise, sample-and-hold, ADC.** kT/C noise of the feedback capacitor (and of the hold
   capacitor), amplifier noise, then an ideal ADC with clipping.
6. **Fixed pattern.** Per-plate gain and offset mismatch, dead plates (bottom code) and stuck
   plates (a fixed code), drawn once per physical sensor by :meth:`Sensor.realize`.

:class:`Sensor` holds the design (all parameters, SI units in the names), :class:`SensorUnit` one
manufactured sensor (its fixed-pattern draws), and :class:`Readout` what one or many frames read.
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass, replace

import numpy as np

from .._validate import check_array, check_in_range, check_int, check_positive, check_real

__all__ = ["EPS0_F_M", "K_B_J_K", "Layer", "Sensor", "SensorUnit", "Readout"]

#: Vacuum permittivity in F/m, pinned to CODATA 2018 (8.8541878128(13)e-12). CODATA 2022 gives
#: 8.8541878188e-12 (6.8e-10 relative higher; scipy >= 1.15 carries that value); a pinned value
#: keeps simulated frames identical across library versions.
EPS0_F_M = 8.8541878128e-12

#: Boltzmann constant in J/K (exact since the 2019 SI redefinition).
K_B_J_K = 1.380649e-23

# Standard normal draws for the gain mismatch are cut at this many sigma so the gain stays
# positive for any allowed gain_mismatch (<= 0.2); the cut changes the std by < 0.1 %.
_GAIN_Z_CUT = 4.0


_check_real = check_real        # shared check (stripstitch._validate)


def _frozen(value, dtype):
    arr = np.array(value, dtype=dtype)   # own copy: the caller's array stays untouched
    arr.flags.writeable = False
    return arr


@dataclass(frozen=True)
class Layer:
    """One dielectric layer of the stack between the plates and the skin.

    Attributes
    ----------
    thickness_um : float
        Thickness in micrometres, >= 0.
    eps_r : float
        Relative permittivity, > 0 (e.g. 3.9 for silicon dioxide, 7.5 for silicon nitride).
    name : str
        Free label, e.g. ``"silicon nitride"``. Default is ``""``.

    Examples
    --------
    >>> Layer(1.0, 3.9, "silicon dioxide").eps_r
    3.9
    """

    thickness_um: float
    eps_r: float
    name: str = ""

    def __post_init__(self):
        object.__setattr__(self, "thickness_um",
                           check_positive(self.thickness_um, name="Layer thickness_um", allow_zero=True))
        object.__setattr__(self, "eps_r", check_positive(self.eps_r, name="Layer eps_r"))
        if not isinstance(self.name, str):
            raise TypeError(f"Layer name must be a str; got {type(self.name).__name__} {self.name!r}")


@dataclass(frozen=True)
class Sensor:
    """Design of one strip sensor: geometry, dielectric stack, amplifier, noise, ADC, mismatch.

    All fields are keyword arguments with SI units in their names; :func:`dataclasses.replace`
    makes variants (every variant is validated again).

    Attributes
    ----------
    n_rows : int
        Plate rows along the swipe (axis 0 of a frame). Default is 8.
    n_cols : int
        Plate columns across the swipe. Default is 192.
    pitch_um : float
        Plate pitch in um (both axes). Default is 50.8 (500 ppi).
    plate_um : float
        Side of the square plate in um, <= ``pitch_um`` (the rest is the inter-plate gap).
        Default is 46.0.
    layers : tuple of Layer
        Dielectric stack between plates and skin, in stacking order (either end first: the
        capacitance does not depend on the order, and the blur is the same both ways by
        reciprocity). Default is 1 um silicon nitride (eps_r 7.5) on 1 um silicon dioxide
        (eps_r 3.9), permittivities from the "Relative permittivity" table in REFERENCE-VALUES.md.
    eps_r_air : float
        Relative permittivity of the air gap. Default is 1.00059 (air at STP).
    eps_r_fluid : float
        Relative permittivity of the moisture film in the gap. Default is 80.2 (water, 20 C).
    lateral_blur : bool
        Whether the fringing-field blur is on (:attr:`blur_sigma_um` is 0 when off).
        Default is True.
    parasitic_F : float
        Parasitic capacitance of each plate to the substrate, in F. Default is 50e-15 (an
        assumption for a ~46 um plate over a few um of oxide, not a measured value).
    replica_mismatch : float
        Standard deviation of the per-plate fraction of ``parasitic_F`` that the replica path
        fails to cancel, in [0, 1]. Default is 0.01 (residual std 0.5 fF, i.e. 5 mV at the output
        with the default amplifier).
    drive_v : float
        Step of the plate drive ``V_H - V_M`` in V, > 0. Default is 1.0.
    feedback_F : float
        Feedback capacitor ``C_F`` of the charge amplifier, in F. Default is 100e-15, so that a
        ridge (48 fF on the default plate) gives 0.48 V, about half of the default ADC range.
    amp_offset_v : float
        Nominal output offset of the amplifier in V (same on every plate). Default is 0.05, which
        keeps valleys, offset mismatch and noise clear of the bottom of the ADC range.
    temperature_K : float
        Temperature for the kT/C noise, >= 0. Default is 300.0.
    amp_noise_v_rms : float
        Output-referred amplifier noise in V rms (white, independent per sample), >= 0.
        Default is 5e-3, which puts the clean ridge/valley SNR (:meth:`snr_db`) near 39.6 dB
        (about 33 dB measured on codes when fixed pattern and quantisation are counted too).
    hold_F : float or None
        Hold capacitor of the sample-and-hold in F (adds its own kT/C noise), or None for an
        ideal, noiseless hold. Default is 1e-12 (64 uV rms at 300 K).
    adc_bits : int
        ADC resolution, 1..16. Codes are ``0 .. 2**adc_bits - 1``, delivered as uint8 for
        <= 8 bits and uint16 otherwise. Default is 8.
    adc_range_v : (float, float)
        Input range ``(lo, hi)`` of the ADC in V, ``lo < hi``; ``lo`` is the centre of code 0 and
        ``hi`` the centre of the top code, inputs outside are clipped. Default is (0.0, 1.0).
    gain_mismatch : float
        Standard deviation of the per-plate relative gain, in [0, 0.2]. Default is 0.02.
    offset_mismatch_v : float
        Standard deviation of the per-plate offset in V, >= 0. Default is 3e-3.
    dead_fraction : float
        Fraction of plates whose output is stuck at code 0, in [0, 1]. Default is 0.0.
    stuck_fraction : float
        Fraction of plates stuck at a fixed random code, in [0, 1] (with ``dead_fraction``,
        at most 1 in total). Default is 0.0.

    Notes
    -----
    Sensed capacitance (layered parallel-plate model, no fringing; series capacitors
    ``1/C = sum 1/C_i``) [1]_::

        C_s = eps0 * A / (sum_i t_i/eps_i + t_air/eps_air + t_fluid/eps_fluid)

    Amplifier (switched-capacitor charge transfer [2]_ [3]_) and readout of plate (r, c)::

        V = g[r, c] * (C_s + C_res[r, c]) * drive_v / feedback_F + offset[r, c] + n

    with ``g = 1 + gain_mismatch * z`` (z cut at +-4), ``offset = amp_offset_v +
    offset_mismatch_v * z'``, ``C_res = parasitic_F * replica_mismatch * z''`` and ``n`` white
    Gaussian noise of std :meth:`noise_v_rms`.

    The kT/C term is the noise the reset switch leaves on the **feedback** capacitor: when the
    switch opens, a noise charge of ``sqrt(kT C_F)`` is frozen on ``C_F`` and appears at the
    output as ``sqrt(kT / C_F)`` [4]_. It is taken as the amplifier's kT/C term because it
    reaches the output at unit gain and does not depend on the finger, so the random noise is
    stationary. The switch noise on the input side (``sqrt(kT (C_s + C_p)) / C_F``, of the same
    order) is not modelled separately; fold it into ``amp_noise_v_rms`` if needed. The hold
    capacitor adds ``sqrt(kT / hold_F)``. All terms are independent and add in quadrature.

    ADC: ``code = clip(round((V - lo) / (hi - lo) * (2**bits - 1)), 0, 2**bits - 1)``, i.e. one
    LSB is ``(hi - lo) / (2**bits - 1)`` and the range ends are the centres of the extreme codes.
    (The other common convention, LSB = range / 2**bits, would move every code boundary by less
    than one LSB.)

    References
    ----------
    .. [1] D. Halliday, R. Resnick and K. S. Krane, *Physics*, Wiley, ch. 30 (capacitor with two
           dielectric slabs in series; from memory).
    .. [2] B. Razavi, *Design of Analog CMOS Integrated Circuits*, McGraw-Hill, 2001, ch. 12
           (switched-capacitor amplifiers).
    .. [3] D. A. Johns and K. Martin, *Analog Integrated Circuit Design*, Wiley, 1997, ch. 10.
    .. [4] B. Razavi, op. cit., ch. 7 (kT/C noise; from memory).

    Examples
    --------
    >>> s = Sensor()
    >>> round(s.plate_capacitance_F(0.0).item() * 1e15, 2)      # ridge, fF
    48.07
    >>> round(s.plate_capacitance_F(50.0).item() * 1e15, 3)     # valley under 50 um of air, fF
    0.372
    >>> round(s.noise_v_rms() * 1e3, 3)                          # mV rms
    5.005
    """

    n_rows: int = 8
    n_cols: int = 192
    pitch_um: float = 50.8
    plate_um: float = 46.0
    layers: tuple = (Layer(1.0, 7.5, "silicon nitride"), Layer(1.0, 3.9, "silicon dioxide"))
    eps_r_air: float = 1.00059
    eps_r_fluid: float = 80.2
    lateral_blur: bool = True
    parasitic_F: float = 50e-15
    replica_mismatch: float = 0.01
    drive_v: float = 1.0
    feedback_F: float = 100e-15
    amp_offset_v: float = 0.05
    temperature_K: float = 300.0
    amp_noise_v_rms: float = 5e-3
    hold_F: float | None = 1e-12
    adc_bits: int = 8
    adc_range_v: tuple = (0.0, 1.0)
    gain_mismatch: float = 0.02
    offset_mismatch_v: float = 3e-3
    dead_fraction: float = 0.0
    stuck_fraction: float = 0.0

    def __post_init__(self):
        def put(name, value):                      # frozen dataclass: normalise in place
            object.__setattr__(self, name, value)

        put("n_rows", check_int(self.n_rows, name="n_rows", lo=1))
        put("n_cols", check_int(self.n_cols, name="n_cols", lo=1))
        put("pitch_um", check_positive(self.pitch_um, name="pitch_um"))
        put("plate_um", check_positive(self.plate_um, name="plate_um"))
        if self.plate_um > self.pitch_um:
            raise ValueError(f"plate_um must be <= pitch_um ({self.pitch_um!r}: plates cannot "
                             f"overlap); got {self.plate_um!r}")
        layers = self.layers
        if isinstance(layers, Layer) or not isinstance(layers, (tuple, list)):
            raise TypeError("layers must be a tuple of Layer(thickness_um, eps_r, name); "
                            f"got {type(layers).__name__}")
        for i, layer in enumerate(layers):
            if not isinstance(layer, Layer):
                raise TypeError(f"layers[{i}] must be a Layer(thickness_um, eps_r, name); "
                                f"got {type(layer).__name__} {layer!r}")
        put("layers", tuple(layers))
        if self.stack_electrical_um <= 0:
            raise ValueError("layers must include at least one layer of thickness_um > 0 (a "
                             "touching ridge would short the plate); got "
                             f"{[lay.thickness_um for lay in self.layers]}")
        put("eps_r_air", check_positive(self.eps_r_air, name="eps_r_air"))
        put("eps_r_fluid", check_positive(self.eps_r_fluid, name="eps_r_fluid"))
        if not isinstance(self.lateral_blur, (bool, np.bool_)):
            raise TypeError(f"lateral_blur must be True or False; got {type(self.lateral_blur).__name__} "
                            f"{self.lateral_blur!r}")
        put("lateral_blur", bool(self.lateral_blur))
        put("parasitic_F", check_positive(self.parasitic_F, name="parasitic_F", allow_zero=True))
        put("replica_mismatch", check_in_range(self.replica_mismatch, 0.0, 1.0, name="replica_mismatch"))
        put("drive_v", check_positive(self.drive_v, name="drive_v"))
        put("feedback_F", check_positive(self.feedback_F, name="feedback_F"))
        put("amp_offset_v", _check_real(self.amp_offset_v, name="amp_offset_v"))
        put("temperature_K", check_positive(self.temperature_K, name="temperature_K", allow_zero=True))
        put("amp_noise_v_rms", check_positive(self.amp_noise_v_rms, name="amp_noise_v_rms", allow_zero=True))
        put("hold_F", check_positive(self.hold_F, name="hold_F", allow_none=True))
        put("adc_bits", check_int(self.adc_bits, name="adc_bits", lo=1, hi=16))
        rng_v = self.adc_range_v
        if not isinstance(rng_v, (tuple, list, np.ndarray)) or len(rng_v) != 2:
            raise ValueError(f"adc_range_v must be a pair (lo_v, hi_v) with lo_v < hi_v; got {rng_v!r}")
        lo = _check_real(rng_v[0], name="adc_range_v[0]")
        hi = _check_real(rng_v[1], name="adc_range_v[1]")
        if not lo < hi:
            raise ValueError(f"adc_range_v must be a pair (lo_v, hi_v) with lo_v < hi_v; got {rng_v!r}")
        put("adc_range_v", (lo, hi))
        put("gain_mismatch", check_in_range(self.gain_mismatch, 0.0, 0.2, name="gain_mismatch"))
        put("offset_mismatch_v", check_positive(self.offset_mismatch_v, name="offset_mismatch_v",
                                                allow_zero=True))
        put("dead_fraction", check_in_range(self.dead_fraction, 0.0, 1.0, name="dead_fraction"))
        put("stuck_fraction", check_in_range(self.stuck_fraction, 0.0, 1.0, name="stuck_fraction"))
        if self.dead_fraction + self.stuck_fraction > 1.0:
            raise ValueError("dead_fraction + stuck_fraction must be <= 1; got "
                             f"{self.dead_fraction!r} + {self.stuck_fraction!r}")

    # ----------------------------------------------------------------- geometry, capacitance
    @property
    def shape(self) -> tuple:
        """Frame shape ``(n_rows, n_cols)``."""
        return (self.n_rows, self.n_cols)

    @property
    def plate_area_m2(self) -> float:
        """Area of one plate in m^2 (``plate_um**2``)."""
        return (self.plate_um * 1e-6) ** 2

    @property
    def stack_thickness_um(self) -> float:
        """Physical thickness of the dielectric stack in um (``sum t_i``)."""
        return float(sum(layer.thickness_um for layer in self.layers))

    @property
    def stack_electrical_um(self) -> float:
        """Electrical (vacuum-equivalent) thickness of the stack in um (``sum t_i / eps_i``)."""
        return float(sum(layer.thickness_um / layer.eps_r for layer in self.layers))

    @property
    def blur_sigma_um(self) -> float:
        """Sigma in um of the Gaussian fringing blur of the capacitance density (0 when off).

        Model (an approximation): the skin touching the stack is a grounded plane, the plates a
        plane below it. For a homogeneous dielectric slab of thickness ``d`` the exact solution
        of Laplace's equation gives the transfer function ``H(k) = k d / sinh(k d)`` from a
        potential pattern of wave number ``k`` on the plate plane to the flux through the skin
        plane (the point-spread is ``sech^2``-shaped, of width ~ d). The Gaussian used here
        matches its second moment: ``H(k) ~ 1 - (k d)^2 / 6`` gives ``sigma = d / sqrt(3)``,
        per axis, in 2-D as in 3-D. The spread scales with the **physical** thickness: in a
        homogeneous isotropic layer eps_r drops out of Laplace's equation, so the electrical
        thickness ``d / eps_r`` sets the capacitance but not the lateral spread. For a layered
        stack the 2x2 transfer matrices of the layers (``[[cosh kt, sinh kt / (eps k)],
        [eps k sinh kt, cosh kt]]``) are multiplied to second order in ``k``; with ``M12 = b0 +
        b2 k^2``, ``sigma^2 = 2 b2 / b0``. Sigma is then proportional to the stack thickness
        (scaling all layers by ``s`` scales it by ``s``), with a factor set by the permittivity
        profile (``1 / sqrt(3)`` for one layer or two equal-thickness layers).

        Not modelled: the extra spread through the air gap under a valley (the density keeps
        the 1-D gap there) and the exact non-Gaussian tails.
        """
        if not self.lateral_blur:
            return 0.0
        a0, a2 = np.eye(2), np.zeros((2, 2))   # transfer matrix: a0 + a2 k^2 (+ O(k^4))
        for layer in self.layers:
            t, e = layer.thickness_um, layer.eps_r
            l0 = np.array([[1.0, t / e], [0.0, 1.0]])
            l2 = np.array([[t * t / 2, t ** 3 / (6 * e)], [e * t, t * t / 2]])
            a0, a2 = l0 @ a0, l0 @ a2 + l2 @ a0
        return float(np.sqrt(2.0 * a2[0, 1] / a0[0, 1]))

    def capacitance_density_F_m2(self, air_gap_um, fluid_um=0.0) -> np.ndarray:
        """Sensed capacitance per unit plate area in F/m^2 (1-D layered parallel-plate model).

        Parameters
        ----------
        air_gap_um : array_like
            Gap between the top of the stack and the skin in um, >= 0 (0 = ridge in contact).
        fluid_um : array_like, optional
            Thickness in um of a moisture film (permittivity ``eps_r_fluid``) filling the bottom
            of the gap, >= 0; a film thicker than the gap is clipped to it (the gap is then full
            of fluid). Broadcast against ``air_gap_um``. Default is 0.0.

        Returns
        -------
        ndarray of float64
            ``eps0 / (sum_i t_i/eps_i + (gap - f)/eps_r_air + f/eps_r_fluid)`` with lengths in
            metres and ``f = min(fluid_um, air_gap_um)``; broadcast shape of the inputs.

        Examples
        --------
        >>> s = Sensor(layers=(Layer(2.0, 3.9),))
        >>> round(float(s.capacitance_density_F_m2(0.0)) * 1e6, 4)  # eps0 * 3.9 / 2 um, uF/m^2
        17.2657
        """
        gap = check_array(air_gap_um, name="air_gap_um")
        fluid = check_array(fluid_um, name="fluid_um")
        if np.any(gap < 0):
            raise ValueError(f"air_gap_um must be >= 0 (um between stack and skin); got min {gap.min()!r}")
        if np.any(fluid < 0):
            raise ValueError(f"fluid_um must be >= 0 (um of moisture in the gap); got min {fluid.min()!r}")
        try:
            gap, fluid = np.broadcast_arrays(gap, fluid)
        except ValueError as exc:
            raise ValueError(f"fluid_um (shape {fluid.shape}) must broadcast against air_gap_um "
                             f"(shape {gap.shape})") from exc
        wet = np.minimum(fluid, gap)
        electrical_um = (self.stack_electrical_um + (gap - wet) / self.eps_r_air
                         + wet / self.eps_r_fluid)
        return EPS0_F_M / (electrical_um * 1e-6)

    def plate_capacitance_F(self, air_gap_um, fluid_um=0.0) -> np.ndarray:
        """Sensed capacitance of one plate in F for a gap that is flat over the plate.

        ``capacitance_density_F_m2(air_gap_um, fluid_um) * plate_area_m2``; see there for the
        parameters. For a gap that varies over the plate, integrate the density instead.

        Examples
        --------
        >>> s = Sensor(plate_um=50.0, layers=(Layer(2.0, 3.9),))
        >>> round(float(s.plate_capacitance_F(0.0)) * 1e15, 3)     # fF
        43.164
        """
        return self.capacitance_density_F_m2(air_gap_um, fluid_um) * self.plate_area_m2

    # ----------------------------------------------------------------- amplifier, noise, ADC
    def output_v(self, sense_F) -> np.ndarray:
        """Ideal amplifier output in V: ``sense_F * drive_v / feedback_F + amp_offset_v``.

        No noise, no parasitic residual, no gain or offset mismatch, no clipping.

        Parameters
        ----------
        sense_F : array_like
            Sensed plate capacitance in F, any shape.

        Returns
        -------
        ndarray of float64, same shape.

        Examples
        --------
        >>> s = Sensor(amp_offset_v=0.0)
        >>> float(s.output_v(50e-15))
        0.5
        """
        sense = check_array(sense_F, name="sense_F")
        return sense * (self.drive_v / self.feedback_F) + self.amp_offset_v

    @property
    def max_code(self) -> int:
        """Top ADC code, ``2**adc_bits - 1``."""
        return (1 << self.adc_bits) - 1

    @property
    def code_dtype(self) -> np.dtype:
        """dtype of delivered codes: uint8 for <= 8 bits, else uint16."""
        return np.dtype(np.uint8 if self.adc_bits <= 8 else np.uint16)

    @property
    def lsb_v(self) -> float:
        """One ADC step in V, ``(hi - lo) / (2**adc_bits - 1)``."""
        lo, hi = self.adc_range_v
        return (hi - lo) / self.max_code

    def to_codes(self, volts) -> np.ndarray:
        """Voltages to fractional ADC codes, ``(volts - lo) / lsb_v``, without rounding or clipping.

        Examples
        --------
        >>> Sensor().to_codes([0.0, 0.5, 1.0]).tolist()
        [0.0, 127.5, 255.0]
        """
        v = check_array(volts, name="volts")
        lo, _ = self.adc_range_v
        return (v - lo) / self.lsb_v

    def noise_v_rms(self) -> float:
        """Total output-referred random noise in V rms.

        ``sqrt(kT/feedback_F + kT/hold_F + amp_noise_v_rms**2)`` (the hold term only when
        ``hold_F`` is set); see the class Notes for which kT/C terms are modelled and why.
        """
        kt = K_B_J_K * self.temperature_K
        var = kt / self.feedback_F + self.amp_noise_v_rms ** 2
        if self.hold_F is not None:
            var += kt / self.hold_F
        return float(np.sqrt(var))

    def contrast_v(self, *, valley_gap_um=50.0) -> float:
        """Ideal output swing in V between a ridge (gap 0) and a valley over a whole plate.

        Parameters
        ----------
        valley_gap_um : float, optional
            Air gap under a valley in um, > 0. Default is 50.0 (a common modelling choice).
        """
        gap = check_positive(valley_gap_um, name="valley_gap_um")
        c = self.plate_capacitance_F(np.array([0.0, gap]))
        return float(c[0] - c[1]) * self.drive_v / self.feedback_F

    def snr_db(self, *, valley_gap_um=50.0) -> float:
        """Clean ridge/valley SNR in dB: ``20 log10(contrast_v / noise_v_rms)``.

        Random noise only (no fixed pattern, no quantisation). Infinite without noise.

        Examples
        --------
        >>> round(Sensor().snr_db(), 1)
        39.6
        """
        noise = self.noise_v_rms()
        if noise == 0:
            return float("inf")
        return float(20.0 * np.log10(self.contrast_v(valley_gap_um=valley_gap_um) / noise))

    def with_snr_db(self, snr_db, *, valley_gap_um=50.0) -> "Sensor":
        """Return a copy whose ``amp_noise_v_rms`` gives the requested clean SNR in dB.

        Raises ``ValueError`` when the kT/C noise alone is already above the target noise.

        Examples
        --------
        >>> round(Sensor().with_snr_db(30.0).snr_db(), 6)
        30.0
        """
        target_db = _check_real(snr_db, name="snr_db")
        target = self.contrast_v(valley_gap_um=valley_gap_um) / 10.0 ** (target_db / 20.0)
        thermal_sq = replace(self, amp_noise_v_rms=0.0).noise_v_rms() ** 2
        if target ** 2 < thermal_sq:
            best = self.contrast_v(valley_gap_um=valley_gap_um) / np.sqrt(thermal_sq)
            raise ValueError(f"snr_db must be <= {20 * np.log10(best):.2f} dB (the kT/C noise limit of "
                             f"this sensor); got {snr_db!r}")
        return replace(self, amp_noise_v_rms=float(np.sqrt(target ** 2 - thermal_sq)))

    # ----------------------------------------------------------------- one physical sensor
    def realize(self, rng=None) -> "SensorUnit":
        """Draw the fixed pattern of one manufactured sensor.

        Draws, in this order: gain (``1 + gain_mismatch * z``, z cut at +-4 so the gain stays
        positive), offset (``amp_offset_v + offset_mismatch_v * z``), parasitic residual
        (``parasitic_F * replica_mismatch * z``), then exactly ``round(dead_fraction * n)`` dead
        and ``round(stuck_fraction * n)`` stuck plates (disjoint, ``n = n_rows * n_cols``), and a
        uniform random code in ``0 .. max_code`` for each stuck plate.

        Parameters
        ----------
        rng : None, int or numpy.random.Generator, optional
            Seed or generator (``np.random.default_rng(rng)``). Default is None.

        Returns
        -------
        SensorUnit

        Examples
        --------
        >>> unit = Sensor(dead_fraction=0.01).realize(rng=0)
        >>> int(unit.dead.sum()), unit.gain.shape
        (15, (8, 192))
        """
        rng = np.random.default_rng(rng)
        shape = self.shape
        n = self.n_rows * self.n_cols
        gain = 1.0 + self.gain_mismatch * np.clip(rng.standard_normal(shape), -_GAIN_Z_CUT, _GAIN_Z_CUT)
        offset = self.amp_offset_v + self.offset_mismatch_v * rng.standard_normal(shape)
        residual = self.parasitic_F * self.replica_mismatch * rng.standard_normal(shape)
        n_dead = int(round(self.dead_fraction * n))
        n_stuck = min(int(round(self.stuck_fraction * n)), n - n_dead)
        order = rng.permutation(n)
        dead = np.zeros(n, bool)
        stuck = np.zeros(n, bool)
        dead[order[:n_dead]] = True
        stuck[order[n_dead:n_dead + n_stuck]] = True
        stuck_code = np.where(stuck, rng.integers(0, self.max_code, size=n, endpoint=True), 0)
        return SensorUnit(self, gain, offset, residual, dead.reshape(shape), stuck.reshape(shape),
                          stuck_code.reshape(shape))


@dataclass(frozen=True, eq=False)
class SensorUnit:
    """One physical sensor: the fixed-pattern draws of a :class:`Sensor`, constant over a swipe.

    Attributes
    ----------
    sensor : Sensor
        The design.
    gain : (R, C) ndarray of float64
        Multiplicative gain of each plate's signal path (1 = nominal).
    offset_v : (R, C) ndarray of float64
        Output offset of each plate in V (nominal ``amp_offset_v`` plus mismatch).
    residual_F : (R, C) ndarray of float64
        Parasitic capacitance left after replica cancellation, in F (either sign).
    dead : (R, C) ndarray of bool
        Dead plates: code 0 and volts at the bottom of the ADC range, always.
    stuck : (R, C) ndarray of bool
        Stuck plates: always ``stuck_code``, volts at that code's centre.
    stuck_code : (R, C) ndarray of int64
        Code of each stuck plate (0 elsewhere).
    """

    sensor: Sensor
    gain: np.ndarray
    offset_v: np.ndarray
    residual_F: np.ndarray
    dead: np.ndarray
    stuck: np.ndarray
    stuck_code: np.ndarray

    def __post_init__(self):
        if not isinstance(self.sensor, Sensor):
            raise TypeError(f"sensor must be a Sensor; got {type(self.sensor).__name__}")
        shape = self.sensor.shape
        for name, dtype in (("gain", np.float64), ("offset_v", np.float64), ("residual_F", np.float64),
                            ("dead", bool), ("stuck", bool), ("stuck_code", np.int64)):
            arr = _frozen(getattr(self, name), dtype)
            if arr.shape != shape:
                raise ValueError(f"{name} must have the sensor's frame shape {shape}; got {arr.shape}")
            object.__setattr__(self, name, arr)
        if np.any(self.dead & self.stuck):
            raise ValueError("dead and stuck must not both be set for a plate; got "
                             f"{int(np.sum(self.dead & self.stuck))} plate(s) with both")
        if np.any((self.stuck_code < 0) | (self.stuck_code > self.sensor.max_code)):
            raise ValueError(f"stuck_code must be in [0, {self.sensor.max_code}]; got "
                             f"[{self.stuck_code.min()}, {self.stuck_code.max()}]")

    def readout(self, sense_F, *, rng=None) -> "Readout":
        """Read sensed capacitances through this sensor's electronics.

        Parameters
        ----------
        sense_F : (..., R, C) array_like
            Sensed capacitance of each plate in F, >= 0 (any number of leading frame axes).
        rng : None, int or numpy.random.Generator, optional
            Seed or generator for the random noise (one independent draw per plate and frame).
            Default is None.

        Returns
        -------
        Readout
            ``codes`` (uint8/uint16), ``volts`` (held analogue output, with noise) and
            ``ideal_codes`` (float: ``sensor.to_codes(sensor.output_v(sense_F))``, no noise,
            mismatch, quantisation or clipping; dead and stuck plates keep their ideal value).

        Examples
        --------
        >>> s = Sensor(amp_offset_v=0.0, gain_mismatch=0.0, offset_mismatch_v=0.0,
        ...            replica_mismatch=0.0, temperature_K=0.0, amp_noise_v_rms=0.0)
        >>> out = s.realize(rng=0).readout(np.full((2, 8, 192), 43.1641e-15), rng=1)
        >>> out.codes.shape, out.codes.dtype.name, int(out.codes[0, 0, 0])
        ((2, 8, 192), 'uint8', 110)
        """
        s = self.sensor
        sense = check_array(sense_F, name="sense_F")
        if sense.ndim < 2 or sense.shape[-2:] != s.shape:
            raise ValueError(f"sense_F must have shape (..., {s.n_rows}, {s.n_cols}) (frames of "
                             f"this sensor); got {sense.shape}")
        if np.any(sense < 0):
            raise ValueError(f"sense_F must be >= 0 (farads); got min {sense.min()!r}")
        rng = np.random.default_rng(rng)
        ideal_codes = s.to_codes(s.output_v(sense))
        volts = self.gain * ((sense + self.residual_F) * (s.drive_v / s.feedback_F)) + self.offset_v
        sigma = s.noise_v_rms()
        if sigma > 0:
            volts = volts + sigma * rng.standard_normal(sense.shape)
        lo, _ = s.adc_range_v
        volts = np.where(self.dead, lo, volts)
        volts = np.where(self.stuck, lo + self.stuck_code * s.lsb_v, volts)
        codes = np.clip(np.rint(s.to_codes(volts)), 0, s.max_code).astype(s.code_dtype)
        return Readout(codes=codes, volts=volts, ideal_codes=ideal_codes)


@dataclass(frozen=True, eq=False)
class Readout:
    """What a sensor delivers for one or many frames.

    Attributes
    ----------
    codes : (..., R, C) ndarray of uint8 or uint16
        ADC codes in ``0 .. 2**adc_bits - 1``: what the sensor delivers.
    volts : (..., R, C) ndarray of float64
        Held analogue output before the ADC, with noise and fixed pattern (dead plates at the
        bottom of the ADC range, stuck plates at their code's centre).
    ideal_codes : (..., R, C) ndarray of float64
        Fractional codes without noise, mismatch, quantisation or clipping.
    """

    codes: np.ndarray
    volts: np.ndarray
    ideal_codes: np.ndarray

    def __post_init__(self):
        codes = np.asarray(self.codes)
        if codes.dtype not in (np.dtype(np.uint8), np.dtype(np.uint16)):
            raise TypeError(f"codes must be uint8 or uint16; got dtype {codes.dtype}")
        object.__setattr__(self, "codes", _frozen(codes, codes.dtype))
        for name in ("volts", "ideal_codes"):
            arr = _frozen(getattr(self, name), np.float64)
            if arr.shape != codes.shape:
                raise ValueError(f"{name} must have the shape of codes {codes.shape}; got {arr.shape}")
            object.__setattr__(self, name, arr)
