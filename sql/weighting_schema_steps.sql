-- One row per wave and weighting stage ("base", each declared step, "final"): weight summaries (Kish).
create table if not exists weighting_steps (
    wave varchar not null,
    position integer not null,       -- 0 = base weights, 1.. = declared steps in order, last = final
    stage varchar not null,          -- base | nonresponse | poststratify | rake | trim | calibrate | final
    n bigint,
    total double,
    minimum double,
    maximum double,
    mean double,
    cv double,
    deff double,
    n_eff double,
    efficiency_pct double,
    iterations integer,
    converged boolean,
    trimmed bigint
)
