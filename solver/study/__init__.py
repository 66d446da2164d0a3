"""Study tools: everything done with runs rather than inside one. Readers of run folders,
`check`, `inspect`, `sweep`, `report`, `estimate`, `bench` (with the particle benchmarks) and
the demo. They sit on the run machinery; only the command line imports them."""
