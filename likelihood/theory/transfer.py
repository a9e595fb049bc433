"""Linear matter transfer functions T(k) (T -> 1 as k -> 0) and tabulated spectra.

* Eisenstein & Hu (1998, ApJ 496, 605; "EH98") fitting formula with baryon wiggles, accurate to
  a few per cent against Boltzmann codes, and its no-wiggle form (EH98 eqs. 26-31);
* a user table of T(k) or of the z = 0 linear P(k) (two columns, comment header).
Wavenumbers of the EH98 functions are in 1/Mpc (k h for k in h/Mpc), as in the paper.
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import DataError

__all__ = ["eh98_parameters", "eh98_transfer", "eh98_nowiggle_transfer", "eh98_sound_horizon_fit",
           "read_table"]

def eh98_parameters(omega_m, omega_b, T_cmb=2.7255):
    """Scale-independent quantities of the Eisenstein & Hu (1998, ApJ 496, 605) transfer function.

    omega_m = Omega_0 h^2 (all matter), omega_b = Omega_b h^2, Theta = T_cmb / 2.7 K.
    Returns a dict with lengths in Mpc and wavenumbers in 1/Mpc (NOT h units):

    z_eq = 2.50e4 omega_m Theta^-4                                   (EH98 eq. 2)
    k_eq = 7.46e-2 omega_m Theta^-2 Mpc^-1                           (eq. 3)
    z_d  = 1291 omega_m^0.251 / (1 + 0.659 omega_m^0.828) (1 + b1 omega_b^b2),
           b1 = 0.313 omega_m^-0.419 (1 + 0.607 omega_m^0.674), b2 = 0.238 omega_m^0.223  (eq. 4)
    R(z) = 31.5 omega_b Theta^-4 (z / 10^3)^-1                       (eq. 5)
    s    = 2/(3 k_eq) sqrt(6/R_eq) ln[(sqrt(1+R_d) + sqrt(R_d+R_eq)) / (1 + sqrt(R_eq))]  (eq. 6)
    k_silk = 1.6 omega_b^0.52 omega_m^0.73 [1 + (10.4 omega_m)^-0.95] Mpc^-1  (eq. 7)
    alpha_c = a1^(-f_b) a2^(-f_b^3), a1 = (46.9 omega_m)^0.670 [1 + (32.1 omega_m)^-0.532],
              a2 = (12.0 omega_m)^0.424 [1 + (45.0 omega_m)^-0.582]  (eq. 11)
    beta_c^-1 = 1 + b1 (f_c^b2 - 1), b1 = 0.944 / [1 + (458 omega_m)^-0.708],
              b2 = (0.395 omega_m)^-0.0266                           (eq. 12)
    alpha_b = 2.07 k_eq s (1 + R_d)^(-3/4) G((1+z_eq)/(1+z_d)),
              G(y) = y [-6 sqrt(1+y) + (2+3y) ln((sqrt(1+y)+1)/(sqrt(1+y)-1))]  (eqs. 14-15)
    beta_node = 8.41 omega_m^0.435                                   (eq. 23)
    beta_b = 0.5 + f_b + (3 - 2 f_b) sqrt((17.2 omega_m)^2 + 1)      (eq. 24)
    """
    theta = T_cmb / 2.7
    f_b = omega_b / omega_m
    f_c = 1.0 - f_b
    z_eq = 2.50e4 * omega_m * theta**-4
    k_eq = 7.46e-2 * omega_m * theta**-2
    b1 = 0.313 * omega_m**-0.419 * (1.0 + 0.607 * omega_m**0.674)
    b2 = 0.238 * omega_m**0.223
    z_d = 1291.0 * omega_m**0.251 / (1.0 + 0.659 * omega_m**0.828) * (1.0 + b1 * omega_b**b2)
    r_coef = 31.5 * omega_b * theta**-4 * 1e3
    R_d = r_coef / z_d
    R_eq = r_coef / z_eq
    s = (2.0 / (3.0 * k_eq) * math.sqrt(6.0 / R_eq)
         * math.log((math.sqrt(1.0 + R_d) + math.sqrt(R_d + R_eq)) / (1.0 + math.sqrt(R_eq))))
    k_silk = 1.6 * omega_b**0.52 * omega_m**0.73 * (1.0 + (10.4 * omega_m)**-0.95)
    a1 = (46.9 * omega_m)**0.670 * (1.0 + (32.1 * omega_m)**-0.532)
    a2 = (12.0 * omega_m)**0.424 * (1.0 + (45.0 * omega_m)**-0.582)
    alpha_c = a1**(-f_b) * a2**(-f_b**3)
    bb1 = 0.944 / (1.0 + (458.0 * omega_m)**-0.708)
    bb2 = (0.395 * omega_m)**-0.0266
    beta_c = 1.0 / (1.0 + bb1 * (f_c**bb2 - 1.0))
    y = (1.0 + z_eq) / (1.0 + z_d)
    sq = math.sqrt(1.0 + y)
    G = y * (-6.0 * sq + (2.0 + 3.0 * y) * math.log((sq + 1.0) / (sq - 1.0)))
    alpha_b = 2.07 * k_eq * s * (1.0 + R_d)**-0.75 * G
    beta_node = 8.41 * omega_m**0.435
    beta_b = 0.5 + f_b + (3.0 - 2.0 * f_b) * math.sqrt((17.2 * omega_m)**2 + 1.0)
    return dict(theta=theta, f_b=f_b, f_c=f_c, z_eq=z_eq, k_eq=k_eq, z_d=z_d, R_d=R_d,
                R_eq=R_eq, s=s, k_silk=k_silk, alpha_c=alpha_c, beta_c=beta_c,
                alpha_b=alpha_b, beta_b=beta_b, beta_node=beta_node)


def _eh98_t0(q, alpha, beta, L=None, tail=None):
    """EH98 eqs. 19-20: T0(k; alpha, beta) = L / (L + C q^2), L = ln(e + 1.8 beta q),
    C = 14.2/alpha + 386 / (1 + 69.9 q^1.08); L and the 386/(...) term may be passed in when
    already computed (the same numbers)."""
    if L is None:
        L = np.log(math.e + 1.8 * beta * q)
    if tail is None:
        tail = 386.0 / (1.0 + 69.9 * q**1.08)
    C = 14.2 / alpha + tail
    return L / (L + C * q * q)


def eh98_transfer(k_mpc, par):
    """EH98 transfer function with baryon acoustic wiggles; k in 1/Mpc, ``par`` from
    :func:`eh98_parameters`.

    T = f_b T_b + f_c T_c                                              (EH98 eq. 16)
    T_c = f T0(k,1,beta_c) + (1-f) T0(k,alpha_c,beta_c), f = 1/(1+(ks/5.4)^4)  (eqs. 17-18)
    T_b = [T0(k,1,1)/(1+(ks/5.2)^2) + alpha_b/(1+(beta_b/ks)^3) exp(-(k/k_silk)^1.4)] j0(k s~),
    s~ = s / [1 + (beta_node/(ks))^3]^(1/3)                           (eqs. 21-22)
    q = k / (13.41 k_eq)                                               (eq. 10)
    """
    k = np.asarray(k_mpc, dtype=float)
    s = par["s"]
    ks = k * s
    q = k / (13.41 * par["k_eq"])
    f = 1.0 / (1.0 + (ks / 5.4)**4)
    tail = 386.0 / (1.0 + 69.9 * q**1.08)          # the three T0 share C's k-dependent part
    log_c = np.log(math.e + 1.8 * par["beta_c"] * q)  # and T_c's two share L
    t_c = (f * _eh98_t0(q, 1.0, par["beta_c"], log_c, tail)
           + (1.0 - f) * _eh98_t0(q, par["alpha_c"], par["beta_c"], log_c, tail))
    s_tilde = s / np.cbrt(1.0 + (par["beta_node"] / ks)**3)
    x = k * s_tilde
    j0 = np.sinc(x / math.pi)
    t_b = (_eh98_t0(q, 1.0, 1.0, None, tail) / (1.0 + (ks / 5.2)**2)
           + par["alpha_b"] / (1.0 + (par["beta_b"] / ks)**3)
           * np.exp(-(k / par["k_silk"])**1.4)) * j0
    return par["f_b"] * t_b + par["f_c"] * t_c


def eh98_sound_horizon_fit(omega_m, omega_b):
    """EH98 eq. 26: s ~ 44.5 ln(9.83/omega_m) / sqrt(1 + 10 omega_b^(3/4)) Mpc."""
    return 44.5 * math.log(9.83 / omega_m) / math.sqrt(1.0 + 10.0 * omega_b**0.75)


def eh98_nowiggle_transfer(k_mpc, h, omega_m, omega_b, T_cmb=2.7255):
    """EH98 zero-baryon-wiggle ("no-wiggle") transfer function; k in 1/Mpc.

    s from eq. 26 (:func:`eh98_sound_horizon_fit`),
    alpha_Gamma = 1 - 0.328 ln(431 omega_m) f_b + 0.38 ln(22.3 omega_m) f_b^2   (eq. 31)
    Gamma_eff = Omega_0 h [alpha_Gamma + (1 - alpha_Gamma) / (1 + (0.43 k s)^4)]  (eq. 30)
    q = (k / h Mpc^-1) Theta^2 / Gamma_eff                                          (eq. 28)
    T0 = L0 / (L0 + C0 q^2), L0 = ln(2e + 1.8 q), C0 = 14.2 + 731 / (1 + 62.5 q)   (eq. 29)
    """
    k = np.asarray(k_mpc, dtype=float)
    theta = T_cmb / 2.7
    f_b = omega_b / omega_m
    s = eh98_sound_horizon_fit(omega_m, omega_b)
    alpha_g = (1.0 - 0.328 * math.log(431.0 * omega_m) * f_b
               + 0.38 * math.log(22.3 * omega_m) * f_b * f_b)
    gamma_eff = (omega_m / h) * (alpha_g + (1.0 - alpha_g) / (1.0 + (0.43 * k * s)**4))
    q = k * theta * theta / (h * gamma_eff)
    L0 = np.log(2.0 * math.e + 1.8 * q)
    C0 = 14.2 + 731.0 / (1.0 + 62.5 * q)
    return L0 / (L0 + C0 * q * q)


def read_table(path, kind):
    """Read a two-column (k [h/Mpc], value) text table; return (ln k, ln value)."""
    try:
        with open(path, "r", encoding="utf-8") as fh:
            lines = fh.read().splitlines()
    except OSError as exc:
        raise DataError(f"table_file {path!s}: cannot be read ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise DataError(f"table_file {path!s}: not a text file") from None
    header = [ln for ln in lines if ln.strip().startswith("#")]
    if not any("h/mpc" in ln.lower().replace(" ", "") for ln in header):
        expected = "# k[h/Mpc] P[(Mpc/h)^3]" if kind == "power" else "# k[h/Mpc] T(k)"
        raise DataError(f"table_file {path!s}: missing header comment line naming the units, "
                        f"expected e.g. '{expected}'")
    rows = []
    for lineno, ln in enumerate(lines, start=1):
        text = ln.split("#", 1)[0].strip()
        if not text:
            continue
        fields = text.replace(",", " ").split()
        if len(fields) != 2:
            raise DataError(f"table_file {path!s} line {lineno}: expected 2 columns "
                            f"(k, {'P' if kind == 'power' else 'T'}), got {len(fields)}")
        try:
            rows.append((float(fields[0]), float(fields[1])))
        except ValueError:
            raise DataError(f"table_file {path!s} line {lineno}: non-numeric value "
                            f"{text!r}") from None
    if len(rows) < 3:
        raise DataError(f"table_file {path!s}: needs at least 3 rows, got {len(rows)}")
    arr = np.array(rows)
    k, v = arr[:, 0], arr[:, 1]
    if not (np.all(np.isfinite(arr)) and np.all(k > 0) and np.all(v > 0)):
        raise DataError(f"table_file {path!s}: k and {'P' if kind == 'power' else 'T'} "
                        "must be finite and > 0")
    if np.any(np.diff(k) <= 0):
        raise DataError(f"table_file {path!s}: k column must be strictly increasing")
    return np.log(k), np.log(v)
