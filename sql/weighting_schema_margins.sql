-- Per wave, step, margin and category: population target vs unweighted sample vs weighted result.
create table if not exists weighting_margins (
    wave varchar not null,
    position integer not null,
    margin varchar not null,
    category varchar not null,
    target double,
    target_share double,
    sample_count bigint,
    sample_share double,
    achieved double,
    achieved_share double
)
