-- One row per staged wave: what was staged, from which file, when.
create table if not exists waves (
    wave varchar primary key,
    position integer not null,          -- order of the wave in the spec (0 = first)
    label varchar not null,
    fieldwork_start date,
    fieldwork_end date,
    source_file varchar not null,
    sha256 varchar not null,
    row_count bigint not null,
    staged_at timestamp not null,        -- UTC
    spec_signature varchar               -- what the spec said the wave holds (pipeline.staging.wave_columns)
)
