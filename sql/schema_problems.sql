-- Warnings recorded when a wave was staged (errors stop staging and are never recorded).
create table if not exists problems (
    wave varchar not null,
    rule varchar not null,
    severity varchar not null,
    column_name varchar,
    value varchar,
    count bigint,
    examples varchar[],
    message varchar not null,
    recorded_at timestamp not null       -- UTC
)
