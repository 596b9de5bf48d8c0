-- Response by nonresponse-adjustment class, per wave.
create table if not exists weighting_response (
    wave varchar not null,
    weighting_class varchar not null,
    issued bigint,
    respondents bigint,
    nonrespondents bigint,
    ineligible bigint,
    response_rate double,
    weighted_response_rate double,
    factor double
)
