"""Wave analysis of height time series: spectra, dispersion, cylindrical modes."""
