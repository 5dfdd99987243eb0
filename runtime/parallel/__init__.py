"""The parallel machinery: the MPI wrapper (``comm``), the gradient exchange strategies (``exchange``) and
the one place that starts ``mpiexec`` (``launch``)."""
