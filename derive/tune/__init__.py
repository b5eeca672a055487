"""`luforge tune`: derive every candidate for a case, verify it, measure it on the chosen target, rank the
results and write the winner into a spec. One module per step: space, measure, cache, rank, report, write."""
