-- Final weight of every weighted respondent, per wave (nonrespondents and ineligibles have no row).
create table if not exists weights (
    wave varchar not null,
    respondent_id varchar not null,
    weight double not null,
    primary key (wave, respondent_id)
)
