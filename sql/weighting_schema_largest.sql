-- The largest final weights of each wave with their weighting profile (never a respondent id).
create table if not exists weighting_largest (
    wave varchar not null,
    rank integer not null,
    weight double,
    ratio_to_mean double,
    profile varchar
)
