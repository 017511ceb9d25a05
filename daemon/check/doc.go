// Package check judges whether an estimator can run on a plant's model and
// gains file, and says why: the discrete model and how it was obtained, the
// eigenvalues of A with their time constants, the observability of both
// observer forms (a PBH test per mode), the wiring, the noise, and the error
// dynamics of every gain set. Build makes the Report; WriteText renders it
// for a terminal; encoding/json renders it as `surmise check --json` prints
// it. The command line, the daemon's page or a fleet listing can all use it:
// the package imports config and estimator, and nothing of the daemon.
//
// # The JSON report
//
// The JSON field names are those of the struct tags of Report and the types
// it holds; they are a stable interface: fields may be added, none renamed
// or removed. The shape, with the meaning of each field on its type:
//
//	{
//	  "plant", "file", "fingerprint": strings,
//	  "model": {"time", "discretisation", "process_noise", "sample_seconds",
//	            "states", "inputs", "outputs": [{"name", "unit", "nominal"}],
//	            "A", "B", "C", "D": [[row], ...]},
//	  "eigenvalues": [{"re", "im", "abs", "kind",
//	                   "time_constant_seconds", "period_seconds"}],
//	  "observability": {"prediction", "current": {"pair", "rank", "states",
//	                    "observable", "detectable",
//	                    "modes": [{"re", "im", "abs", "sigma_min", "observable",
//	                               "weak", "stable",
//	                               "involves": [{"state", "share"}]}]}},
//	  "wiring": [{"signal", "kind", "subject", "unit", "nominal",
//	              "max_age_seconds", "range"}],
//	  "noise": {"process_density_std", "process_std", "process_correlated",
//	            "measurement_std", "measurement_correlated"},
//	  "settings": {"gains_file", "gate", "window", "publish"},
//	  "gains": null or {"file", "from_plant", "errors", "active", "candidate",
//	            "sets": [{"name", "role", "form", "method", "created", "tool",
//	                      "note", "factor", "requested_poles",
//	                      "patterns": [{"outputs", "poles": [{"re", "im", "abs"}],
//	                                    "spectral_radius", "convergence_seconds",
//	                                    "nis"}],
//	                      "uncovered", "error"}]},
//	  "can_run": bool, "problems": [strings], "notes": [strings]
//	}
//
// Numbers are rounded to ten significant digits (the gains file keeps full
// precision); times are in seconds; an eigenvalue's imaginary part below
// 1e-6·max(1, |λ|) is reported as 0, the scatter rounding gives a repeated
// real eigenvalue. A time that does not exist (the time constant of an
// integrator, the convergence of unstable error dynamics) is null.
package check
