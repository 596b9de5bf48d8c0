-- Notes of a wave's weighting: collapsed categories, accepted non-convergence, rows not weighted.
create table if not exists weighting_notes (
    wave varchar not null,
    position integer,
    severity varchar not null,
    message varchar not null
)
