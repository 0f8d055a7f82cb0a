"""The instability physics across readings: Mathieu/Floquet stability and the tongue, the operating-window
fit and its conclusion, modal (two-Lorentzian) fits and the trend and forecast of a measure."""
