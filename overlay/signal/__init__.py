"""From velocity records to vibration energy ratio: gate, spectra, sound field, reference, incidence."""
