"""What a fit gives: the result object (:mod:`.result`), scoring (:mod:`.scoring`), SQL
export (:mod:`.sqlexport`), relativity tables (:mod:`.tables`), hold-out validation
(:mod:`.validation`), figures (:mod:`.plots`), the summary and HTML report
(:mod:`.report`) and the model file (:mod:`.modelfile`)."""
