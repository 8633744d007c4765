"""The dynamics stage: regimes, Lyapunov exponents, predictability, scans."""
