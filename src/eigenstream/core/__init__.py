"""Pure numerical core: neighbours, kernels, graph normalization, eigenpairs, Nystrom extension."""
