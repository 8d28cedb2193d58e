"""From stored samples to statistics: the shared estimators, the NetCDF summary and the longest
ballistic edge length L*."""
