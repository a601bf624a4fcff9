"""Multiple-comparison corrections: one scorer per correction (:mod:`.scorers`), space x
time clusters (:mod:`.clusters`), TFCE (:mod:`.tfce`), Benjamini-Hochberg (:mod:`.fdr`),
supra-threshold lists (:mod:`.exceedances`) and the compiled loops (:mod:`.unionfind`)."""
