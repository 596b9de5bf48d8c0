-- wb_blank(v): whether a raw value is missing (NULL, or text that is empty once trimmed); for a
-- typed column simply NULL. typeof is resolved when the query is planned.
create or replace temp macro wb_blank(v) as
    case when typeof(v) = 'VARCHAR' then nullif(trim(cast(v as varchar)), '') is null else v is null end
