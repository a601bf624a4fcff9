"""Running the resampling: backends (:mod:`.backends`), memory plans (:mod:`.memory`),
checkpoints (:mod:`.checkpoint`), and the small utilities the compiled and BLAS work
relies on (:mod:`.blas`, :mod:`.pages`, :mod:`.perthread`, :mod:`.prefetch`)."""
