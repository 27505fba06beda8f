"""Simulated bench: a greenhouse canopy-height sensor, physically modelled.

An infrared LED chopped 0/1 at ``led_hz`` lights the canopy; a silicon
photodiode behind a lens collects the diffuse reflection; a transimpedance
amplifier (TIA) turns photocurrent into volts; a 16-bit ADC digitises it.
Channel 0 ("photodiode") is the ADC output in full-scale units (1.0 = 1 V,
the ADC's positive limit); channel 1 ("led") is the LED drive (0 or 1), usable
as a measured reference.  Deterministic for a given ``seed``: samples are made
in fixed chunks of 4096 frames whatever block size the engine reads.

Model (each term a documented physical law; constants are the scene's)
--------------------------------------------------------------------
- Reflected power, diffuse (Lambertian) target [REFERENCES row 9]:
  beam-filling ``P_r = P_led rho A_r / (pi d^2)``; a target smaller than the
  spot intercepts the fraction ``A_t / (pi (d tan(theta))^2)``, so ~1/d^4.
- Photocurrent ``I = R_lambda P`` with R = 0.65 A/W at 940 nm (typical silicon,
  below the ideal 0.758 A/W of row 7c).
- Sunlight: DC photocurrent with slow cloud shadows (smoothed random walk).
- Lamp flicker at twice the mains frequency; PWM grow lights as a 1 kHz
  square wave (30 % duty, all its harmonics); mains hum coupled into the
  amplifier at 50 Hz with odd harmonics; mains frequency wanders +-0.1 Hz
  (row 8).
- Shot noise sqrt(2 q I) of the total photocurrent (row 7b), thermal noise of
  the feedback resistor sqrt(4 k T R) (row 7a), amplifier voltage noise; all
  white, summed as one Gaussian of the summed variance.
- ADC: 16 bits over +-1 V, clipping at the rails, rounding to the code.

Options (``[source]`` table)
----------------------------
seed : int, default 7
    Noise and cloud seed.
pace : "realtime" | "fast", default "realtime"
    "realtime" paces chunks by the wall clock; "fast" runs as fast as the
    consumer reads (the ring never overruns: the producer waits).
led_hz : float, default 1370
    LED chopping frequency (put the same in ``[reference] frequency_hz``).
mains_hz : 50 | 60, default 50
target : "canopy" | "leaf", default "canopy"
    "canopy" fills the beam (1/d^2); "leaf" is a 20 cm^2 target (1/d^4 far out).
distance_m : float, optional
    Hold the target at this distance instead of following the script.
walk_m : list of float, optional
    The walk-away scene: the target held at each distance for ``hold_s``,
    moving between them in ``move_s`` (linearly); the source ends after the
    last hold, and writes truth markers itself (a distance marker where each
    hold begins, a "moving" marker where each move begins; their note says
    they come from the simulation).
hold_s, move_s : float, default 4 and 1
adc_bits : int, default 16
    Resolution of the simulated ADC, 8 to 24 bits.  At 16 bits the scene's
    own noise dithers the quantiser only partly, so its error is not quite
    white; 24 bits makes it negligible (the range tests use that).
sky : "clouds" | "clear", default "clouds"
    "clear" holds the sunlight steady (a known, constant noise density, as
    :meth:`Scene.white_density_fs` computes it).
led_ramp_hz_per_s : float, default 0
    A free-running LED driver warming up: the chopping frequency ramps by this
    much per second from ``led_hz`` (the LED channel follows it).
led_step_s, led_step_fraction : float, optional
    At ``led_step_s`` the chopping frequency jumps by ``led_step_fraction``
    (e.g. 0.01 for 1 %), as when a driver's supply changes.
"""

from __future__ import annotations

import threading

import numpy as np

from livefilt.errors import SettingError
from livefilt.threads import Worker
from livefilt.acquire.source import DeviceInfo, Pacer, Source

__all__ = ["SimulatedSource", "Scene"]

Q_E = 1.602176634e-19  # elementary charge, C (CODATA exact)
K_B = 1.380649e-23  # Boltzmann constant, J/K (CODATA exact)
CHUNK = 4096

# distance script: (duration s, start m, end m); repeats
_SCRIPT = (
    (4.0, 0.4, 0.4), (12.0, 0.4, 2.0), (4.0, 2.0, 2.0), (10.0, 2.0, 4.0),
    (4.0, 4.0, 4.0), (16.0, 4.0, 0.4),
)


class Scene:
    """The physical scene; pure and vectorised (samples from sample indices)."""

    p_led_w = 0.002          # LED optical power while on, W (940 nm)
    rho = 0.45               # canopy reflectance at 940 nm
    a_r_m2 = 7.5e-6          # bare photodiode area (7.5 mm^2), m^2
    beam_half_angle = np.radians(8.0)
    a_leaf_m2 = 20e-4        # small-target area, m^2
    resp_a_w = 0.65          # photodiode responsivity, A/W
    r_f = 20e3               # TIA feedback resistor, ohm
    temp_k = 300.0
    e_amp = 12e-9            # amplifier voltage noise, V/sqrt(Hz)
    i_sun = 40e-6            # sunlight photocurrent under clear sky, A
    i_lamp = 3e-6            # lamp photocurrent (mean), A
    lamp_depth = 0.35        # flicker modulation depth at 2x mains
    i_pwm = 5e-6             # PWM grow light photocurrent while on, A
    pwm_hz, pwm_duty = 1000.0, 0.30
    hum_v = (4e-3, 1.2e-3, 0.6e-3)  # 1st, 3rd, 5th mains harmonics at the TIA output, V
    adc_bits, adc_fs_v = 16, 1.0

    def __init__(self, fs: float, led_hz: float, mains_hz: float, target: str,
                 distance_m: float | None, seed: int, walk_m=None, hold_s: float = 4.0,
                 move_s: float = 1.0):
        self.fs, self.led_hz, self.mains_hz = fs, led_hz, mains_hz
        self.target, self.fixed_distance, self.seed = target, distance_m, seed
        self._script_t = np.cumsum([0.0] + [s[0] for s in _SCRIPT])
        self.walk_m = None if walk_m is None else [float(d) for d in walk_m]
        self.hold_s, self.move_s = float(hold_s), float(move_s)

    # -- walk-away scene --------------------------------------------------
    @property
    def walk_s(self) -> float | None:
        """Length of the walk-away scene, s (None without one)."""
        if self.walk_m is None:
            return None
        return len(self.walk_m) * self.hold_s + (len(self.walk_m) - 1) * self.move_s

    def walk_markers(self) -> list[dict]:
        """The walk's truth markers: a distance where each hold begins, "moving"
        where each move begins."""
        out, t = [], 0.0
        for i, d in enumerate(self.walk_m or []):
            out.append({"time_s": round(t, 6), "distance_m": d,
                        "note": "truth from the simulation (walk-away scene)"})
            t += self.hold_s
            if i + 1 < len(self.walk_m):
                out.append({"time_s": round(t, 6), "note": "moving (walk-away scene, simulated)"})
                t += self.move_s
        return out

    def _walk_distance(self, t):
        d = np.asarray(self.walk_m)
        period = self.hold_s + self.move_s
        t = np.asarray(t, dtype=float)
        k = np.clip(np.floor(t / period).astype(int), 0, len(d) - 1)
        into = t - k * period
        nxt = np.minimum(k + 1, len(d) - 1)
        frac = np.clip((into - self.hold_s) / self.move_s if self.move_s > 0 else 0.0, 0.0, 1.0)
        return d[k] + (d[nxt] - d[k]) * frac

    def distance(self, t: np.ndarray | float) -> np.ndarray:
        """Target distance in metres at time ``t`` (s)."""
        if self.fixed_distance is not None:
            return np.full(np.shape(t), self.fixed_distance)
        if self.walk_m is not None:
            return self._walk_distance(t)
        tt = np.mod(t, self._script_t[-1])
        starts = np.array([s[1] for s in _SCRIPT])
        ends = np.array([s[2] for s in _SCRIPT])
        k = np.clip(np.searchsorted(self._script_t, tt, side="right") - 1, 0, len(_SCRIPT) - 1)
        frac = (tt - self._script_t[k]) / np.array([s[0] for s in _SCRIPT])[k]
        return starts[k] + (ends[k] - starts[k]) * frac

    def reflected_w(self, d: np.ndarray) -> np.ndarray:
        """Received power with the LED on (Lambertian target, REFERENCES row 9)."""
        p = self.p_led_w * self.rho * self.a_r_m2 / (np.pi * d * d)
        if self.target == "leaf":
            spot = np.pi * (d * np.tan(self.beam_half_angle)) ** 2
            p = p * np.minimum(1.0, self.a_leaf_m2 / spot)
        return p

    def signal_rms_fs(self, d: float) -> float:
        """Expected lock-in reading (rms of the fundamental, full-scale units)
        at distance ``d``: a 0..A square has a 2A/pi peak fundamental (row 11)."""
        a = self.resp_a_w * float(self.reflected_w(np.asarray(d))) * self.r_f / self.adc_fs_v
        return 2 * a / np.pi / np.sqrt(2)

    def white_density_fs(self, cloud: float = 1.0) -> float:
        """One-sided white-noise density at the ADC output, full scale per
        sqrt(Hz), under a steady sky (``cloud`` = 1: clear): shot, thermal and
        amplifier noise of the mean photocurrent plus the quantisation noise
        q^2/12 spread over 0..fs/2 (IEEE Std 1241, uniform quantisation;
        common practice).  The signal's own shot noise is left out (under
        1e-4 of the sunlight's current here)."""
        i_mean = self.i_sun * cloud + self.i_lamp + self.i_pwm * self.pwm_duty
        e_v = self.noise_density_v(i_mean)
        return float(np.hypot(e_v, self.quantisation_density_v()) / self.adc_fs_v)

    def quantisation_density_v(self) -> float:
        """The ADC's quantisation noise q^2/12 spread over 0..fs/2, V/sqrt(Hz)
        (IEEE Std 1241, uniform quantisation; common practice)."""
        q = 2 * self.adc_fs_v / 2 ** self.adc_bits
        return float(q / np.sqrt(12 * self.fs / 2))

    def true_range_m(self, snr_db: float, enbw_hz: float, cloud: float = 1.0) -> float:
        """Distance at which the lock-in's SNR falls to ``snr_db``: the signal's
        rms fundamental (:meth:`signal_rms_fs`) over density x sqrt(ENBW)
        (white noise through the output low-pass), solved by bisection."""
        noise = self.white_density_fs(cloud) * np.sqrt(enbw_hz)
        want = noise * 10 ** (snr_db / 20)
        lo, hi = np.log(0.01), np.log(1000.0)
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            if self.signal_rms_fs(float(np.exp(mid))) > want:
                lo = mid
            else:
                hi = mid
        return float(np.exp(0.5 * (lo + hi)))

    def noise_density_v(self, i_total: float) -> float:
        """White-noise density at the TIA output, V/sqrt(Hz) (rows 7a, 7b)."""
        shot = np.sqrt(2 * Q_E * i_total) * self.r_f
        thermal = np.sqrt(4 * K_B * self.temp_k * self.r_f)
        return float(np.sqrt(shot ** 2 + thermal ** 2 + self.e_amp ** 2))


class SimulatedSource(Source):
    """The built-in simulated bench (see module docstring)."""

    driver = "simulated"
    options = {
        "seed": "noise and cloud seed (int, default 7)",
        "pace": '"realtime" (default) or "fast" (as fast as the engine reads)',
        "led_hz": "LED chopping frequency in Hz (default 1370)",
        "mains_hz": "50 or 60 (default 50)",
        "target": '"canopy" (beam-filling, 1/d^2) or "leaf" (small, 1/d^4 far out)',
        "distance_m": "hold the target at this distance instead of the script",
        "walk_m": "walk-away scene: hold the target at each of these distances in turn "
                  "(writes truth markers; the run ends after the last)",
        "hold_s": "walk-away scene: seconds at each distance (default 4)",
        "move_s": "walk-away scene: seconds moving between distances (default 1)",
        "sky": '"clouds" (default, passing clouds) or "clear" (steady sunlight)',
        "adc_bits": "simulated ADC resolution, 8 to 24 bits (default 16)",
        "led_ramp_hz_per_s": "LED frequency drift in Hz per second (default 0)",
        "led_step_s": "time of a step of the LED frequency, s (default none)",
        "led_step_fraction": "size of that step relative to led_hz (default 0.01)",
    }

    def __init__(self, rate_hz: float, seed: int = 7, pace: str = "realtime",
                 led_hz: float = 1370.0, mains_hz: float = 50.0, target: str = "canopy",
                 distance_m: float | None = None, walk_m=None, hold_s: float = 4.0,
                 move_s: float = 1.0, sky: str = "clouds", adc_bits: int = 16,
                 led_ramp_hz_per_s: float = 0.0, led_step_s: float | None = None,
                 led_step_fraction: float = 0.01):
        self.rate_hz = float(rate_hz)
        self.channels = 2
        self.channel_names = ["photodiode", "led"]
        self.units = "FS"
        self.realtime = pace == "realtime"
        self.scene = Scene(self.rate_hz, led_hz, mains_hz, target, distance_m, seed,
                           walk_m, hold_s, move_s)
        self.scene.adc_bits = int(adc_bits)
        self.resolution_bits = int(adc_bits)  # the simulated ADC's codes (clip levels, warnings)
        self.sky = sky
        self.device = (f"greenhouse bench (simulated, seed {seed}, LED {led_hz:g} Hz, "
                       f"mains {mains_hz:g} Hz, {target}"
                       + (f", walk-away {self.scene.walk_m[0]:g}-{self.scene.walk_m[-1]:g} m"
                          if walk_m is not None else "") + ")")
        self.markers = self.scene.walk_markers()
        self._end = None if walk_m is None else int(round(self.scene.walk_s * self.rate_hz))
        self.length_s = self.scene.walk_s
        self.reference_hint = {"frequency_hz": led_hz, "phase_deg": 0.0}
        self._seed = seed
        self.led_ramp, self.led_step_s, self.led_step_fraction = (
            float(led_ramp_hz_per_s), led_step_s, float(led_step_fraction))
        self._cloud_phase = np.random.default_rng([seed, 99]).uniform(0, 2 * np.pi, 3)
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self._index = 0  # next frame index handed to the ring (producer thread)
        self._block = 256  # paced hand-over size, a divisor of CHUNK
        self._noise_power = 0.0  # sum over generated chunks of the white density^2 (V^2/Hz)
        self._noise_chunks = 0

    @classmethod
    def from_settings(cls, options, rate_hz, block):
        cls.check_unknown(options, cls.options)
        seed = options.get("seed", 7)
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise SettingError("source.seed", seed, "must be a whole number >= 0")
        pace = options.get("pace", "realtime")
        if pace not in ("realtime", "fast"):
            raise SettingError("source.pace", pace, 'must be "realtime" or "fast"')
        led = options.get("led_hz", 1370.0)
        if isinstance(led, bool) or not isinstance(led, (int, float)) or not 0 < led < rate_hz / 4:
            raise SettingError("source.led_hz", led,
                               f"must be a frequency between 0 and a quarter of the rate ({rate_hz / 4:g} Hz)")
        mains = options.get("mains_hz", 50.0)
        if mains not in (50, 60):
            raise SettingError("source.mains_hz", mains, "must be 50 or 60")
        target = options.get("target", "canopy")
        if target not in ("canopy", "leaf"):
            raise SettingError("source.target", target, 'must be "canopy" or "leaf"')
        dist = options.get("distance_m")
        if dist is not None and (isinstance(dist, bool) or not isinstance(dist, (int, float))
                                 or not 0.05 <= dist <= 100):
            raise SettingError("source.distance_m", dist, "must be a distance from 0.05 to 100 m")
        walk = options.get("walk_m")
        if walk is not None:
            if dist is not None:
                raise SettingError("source.walk_m", walk, "give either walk_m or distance_m, not both")
            if not isinstance(walk, list) or not walk or any(
                    isinstance(d, bool) or not isinstance(d, (int, float)) or not 0.05 <= d <= 100
                    for d in walk):
                raise SettingError("source.walk_m", walk,
                                   "must be a list of distances from 0.05 to 100 m, e.g. [0.5, 1, 2]")
        times = {}
        for key, default, lo in (("hold_s", 4.0, 0.1), ("move_s", 1.0, 0.0)):
            v = options.get(key, default)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not lo <= v <= 3600:
                raise SettingError(f"source.{key}", v, f"must be a number of seconds from {lo:g} to 3600")
            times[key] = float(v)
        bits = options.get("adc_bits", 16)
        if isinstance(bits, bool) or not isinstance(bits, int) or not 8 <= bits <= 24:
            raise SettingError("source.adc_bits", bits, "must be a whole number of bits from 8 to 24")
        sky = options.get("sky", "clouds")
        if sky not in ("clouds", "clear"):
            raise SettingError("source.sky", sky, 'must be "clouds" or "clear"')
        ramp = options.get("led_ramp_hz_per_s", 0.0)
        if isinstance(ramp, bool) or not isinstance(ramp, (int, float)) or not abs(ramp) <= 100:
            raise SettingError("source.led_ramp_hz_per_s", ramp,
                               "must be a drift from -100 to 100 Hz per second")
        step_s = options.get("led_step_s")
        if step_s is not None and (isinstance(step_s, bool) or not isinstance(step_s, (int, float))
                                   or not step_s >= 0):
            raise SettingError("source.led_step_s", step_s, "must be a time >= 0 s")
        step = options.get("led_step_fraction", 0.01)
        if isinstance(step, bool) or not isinstance(step, (int, float)) or not abs(step) < 0.5:
            raise SettingError("source.led_step_fraction", step,
                               "must be a fraction of led_hz between -0.5 and 0.5")
        src = cls(rate_hz, seed, pace, float(led), float(mains), target,
                  None if dist is None else float(dist), walk, times["hold_s"], times["move_s"], sky, bits,
                  float(ramp), None if step_s is None else float(step_s), float(step))
        src._block = next(b for b in (block, 256, 128, 64, 32, 16) if CHUNK % b == 0)
        src.resolved = {"seed": seed, "pace": pace, "led_hz": float(led), "mains_hz": float(mains),
                        "target": target, "distance_m": None if dist is None else float(dist),
                        "walk_m": walk, **times, "sky": sky, "adc_bits": bits}
        return src

    @classmethod
    def probe(cls):
        return [DeviceInfo(name="greenhouse bench", channels=2,
                           note="built-in simulated source, always available")]

    # -- generation ----------------------------------------------------
    def generate(self, start: int, n: int) -> np.ndarray:
        """Frames ``start .. start+n-1`` as float32 (n, 2), the same for a seed
        however the range is split (noise is drawn per 4096-frame chunk)."""
        if start % CHUNK or n != CHUNK:
            out = np.empty((n, 2), dtype=np.float32)
            k = start - start % CHUNK
            while k < start + n:
                piece = self._generate_chunk(k, CHUNK)
                lo, hi = max(k, start), min(k + CHUNK, start + n)
                out[lo - start:hi - start] = piece[lo - k:hi - k]
                k += CHUNK
            return out
        return self._generate_chunk(start, n)

    def _slow_terms(self, t: np.ndarray):
        """Slowly varying scene terms at times ``t``: (distance m, cloud factor,
        mains phase wander in cycles).  Evaluated at chunk edges only and
        interpolated linearly inside a chunk (they change over seconds)."""
        sc, ph = self.scene, self._cloud_phase
        shade = 0.5 + 0.5 * np.sin(2 * np.pi * 0.013 * t + ph[0]) * np.sin(2 * np.pi * 0.031 * t + ph[1])
        cloud = 1.0 - 0.55 * np.clip(shade + 0.15 * np.sin(2 * np.pi * 0.11 * t + ph[2]), 0, 1) ** 3
        # mains frequency wanders +-0.1 Hz (REFERENCES row 8): phase is its integral
        wander = -0.1 / (2 * np.pi * 0.02) * (np.cos(2 * np.pi * 0.02 * t + ph[0]) - np.cos(ph[0]))
        if self.sky == "clear":
            cloud = np.ones_like(cloud)
        return sc.distance(t), cloud, wander

    def _cycle_fraction(self, k: np.ndarray, f_hz: float) -> np.ndarray:
        """Fraction of the current cycle of ``f_hz`` at sample indices ``k``;
        exact integer arithmetic when frequency and rate are whole numbers."""
        fs = self.rate_hz
        if float(f_hz).is_integer() and fs.is_integer():
            return ((k * int(f_hz)) % int(fs)) * (1.0 / fs)
        c = k * (f_hz / fs)
        return c - np.floor(c)

    def led_hz_at(self, t):
        """The LED's chopping frequency at time ``t`` (s), drift included."""
        t = np.asarray(t, dtype=np.float64)
        f = self.scene.led_hz + self.led_ramp * t
        if self.led_step_s is not None:
            f = f + np.where(t >= self.led_step_s, self.led_step_fraction * self.scene.led_hz, 0.0)
        return f

    def _led_fraction(self, k: np.ndarray) -> np.ndarray:
        """Cycle fraction of the LED drive; its phase is the integral of
        :meth:`led_hz_at` (exact integers without drift)."""
        if not self.led_ramp and self.led_step_s is None:
            return self._cycle_fraction(k, self.scene.led_hz)
        t = k / self.rate_hz
        c = self.scene.led_hz * t + 0.5 * self.led_ramp * t * t
        if self.led_step_s is not None:
            c = c + self.led_step_fraction * self.scene.led_hz * np.maximum(t - self.led_step_s, 0)
        return c - np.floor(c)

    def _generate_chunk(self, start: int, n: int) -> np.ndarray:
        sc, fs = self.scene, self.rate_hz
        k = np.arange(start, start + n, dtype=np.int64)
        frac = np.arange(n) / n
        edges = np.array([start, start + n]) / fs
        (d0, d1), (c0, c1), (w0, w1) = self._slow_terms(edges)
        d = d0 + (d1 - d0) * frac
        cloud = c0 + (c1 - c0) * frac
        led = (self._led_fraction(k) < 0.5).astype(np.float64)  # exact 50 % duty
        pwm = self._cycle_fraction(k, sc.pwm_hz) < sc.pwm_duty
        theta = 2 * np.pi * (self._cycle_fraction(k, sc.mains_hz) + w0 + (w1 - w0) * frac)
        sn = np.sin(theta)
        s2 = sn * sn
        # photocurrents: signal (Lambertian, row 9), sun with clouds, lamp
        # flicker at 2x mains (cos 2x = 1 - 2 sin^2 x), PWM grow lights
        i_total = sc.resp_a_w * sc.reflected_w(d) * led
        i_total += sc.i_sun * cloud
        i_total += sc.i_lamp * (1 + sc.lamp_depth * (1 - 2 * s2))
        i_total += sc.i_pwm * pwm
        v = sc.r_f * i_total
        # hum at the 1st, 3rd, 5th mains harmonics (multiple-angle identities)
        h1, h3, h5 = sc.hum_v
        v += sn * (h1 + h3 * (3 - 4 * s2) + h5 * (5 - 20 * s2 + 16 * s2 * s2))
        density = sc.noise_density_v(float(i_total.mean()))
        self._noise_power += density * density
        self._noise_chunks += 1
        rng = np.random.default_rng([self._seed, start // CHUNK])
        v += rng.standard_normal(n) * (density * np.sqrt(fs / 2))
        q = 2 * sc.adc_fs_v / 2 ** sc.adc_bits
        code = np.clip(np.round(v * (1 / q)), -2 ** (sc.adc_bits - 1), 2 ** (sc.adc_bits - 1) - 1)
        out = np.empty((n, 2), dtype=np.float32)
        out[:, 0] = code * (q / sc.adc_fs_v)
        out[:, 1] = led
        return out

    def expected_noise_fs_per_rthz(self) -> float | None:
        """The white-noise density this bench put into the chunks made so far,
        full-scale units per root hertz: the analog noise (rows 7a, 7b and the
        amplifier) in quadrature with the ADC's quantisation noise, q^2/12
        spread over 0 to fs/2 (IEEE Std 1241).  What ``livefilt check``
        should measure as the floor away from lines."""
        if not self._noise_chunks:
            return None
        sc = self.scene
        quant = sc.quantisation_density_v()
        return float(np.sqrt(self._noise_power / self._noise_chunks + quant * quant)) / sc.adc_fs_v

    def distance_now(self) -> float:
        return float(self.scene.distance(self._index / self.rate_hz))

    def distance_at(self, index: int) -> float:
        """The target's distance at acquisition sample ``index``, m."""
        return float(self.scene.distance(index / self.rate_hz))

    # -- running -------------------------------------------------------
    def start(self, ring) -> None:
        self._stop.clear()
        self._thread = Worker(lambda: self._run(ring), "livefilt-sim", on_error=lambda w: ring.close())
        self._thread.start()

    def _run(self, ring) -> None:
        # Samples are made in fixed 4096-frame chunks (determinism) and handed
        # over in engine-block pieces when paced, so latency stays one block.
        piece = self._block if self.realtime else CHUNK
        chunk, pos = self.generate(self._index, CHUNK), 0
        pacer = Pacer(self.rate_hz, self.realtime, self._stop)
        while pacer.wait(ring, self._index, piece):
            if self._end is not None and self._index + piece > self._end:
                ring.write(chunk[pos:pos + max(0, self._end - self._index)])
                self._index = self._end
                ring.close()  # the walk is over: the run ends here
                return
            ring.write(chunk[pos:pos + piece])
            pos += piece
            self._index += piece
            if pos >= CHUNK:
                chunk, pos = self.generate(self._index, CHUNK), 0

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2)
            self._thread = None

    def status(self):
        return {"distance_m": self.distance_now()}

    def info(self):
        d = super().info()
        d["seed"] = self._seed
        d["scene"] = "greenhouse canopy-height sensor" + (" (walk-away)" if self._end else "")
        d["sky"] = self.sky
        return d
