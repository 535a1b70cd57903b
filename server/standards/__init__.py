"""The register of the lab's reference standards: their certificates, uncertainties, due dates
and own checks, the calibrations that name them, and the units put at risk when one fails."""
