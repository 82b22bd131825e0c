"""Examples shipped with winnow: the aquifer pumping-test demo (invented data)."""
