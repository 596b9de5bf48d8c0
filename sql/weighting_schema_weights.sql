-- Final weight of every weighted respondent, per wave (nonrespondents and ineligibles have no row).
-- (wave, respondent_id) is unique by construction (the weighting reads one wave's staged rows,
-- whose ids are unique); no index enforces it, since replacing a wave's rows under one costs
-- minutes at 1,000,000 respondents where the plain delete and insert take seconds.
create table if not exists weights (
    wave varchar not null,
    respondent_id varchar not null,
    weight double not null
)
