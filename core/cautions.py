"""The cautions every report and summary carries."""

CAUTIONS = (
    "These statistics support the breeder's decision; they do not make it. "
    "One season or one site is weak evidence: weigh these results with the breeder's judgement "
    "and with multi-season, multi-site trials. The release or registration of a variety follows "
    "the official variety-testing and registration rules of your country and your program's own "
    "standards."
)
