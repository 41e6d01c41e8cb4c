"""Request and response models of the HTTP API: the contract, inputs separate from outputs. The
network itself is the solver's NetworkSpec, and the parameters of simulations and what-if
comparisons are service.analysis_requests (the job's input, reused here as they are).

One module per feature, as the routers: networks, jobs, recommendations, closing, calibration
(history too), analysis, problem_types; shared pieces in common. Import each from its module."""
