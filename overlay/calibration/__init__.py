"""Agreement with hammer sounding: the sounding input, the statistics, suggested levels, the report."""
