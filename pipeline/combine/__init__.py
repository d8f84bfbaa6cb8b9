"""Science-ready 1-D products: velocity frame, air/vacuum, coadds of exposures, splices of setups."""
