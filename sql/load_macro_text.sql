-- wb_text(v): a raw value as trimmed text, with empty text as NULL (how every column is read).
-- v is text as in the file, or a number of a column read typed (pipeline.staging.readers), which
-- reads as its integer code (wb_code). typeof is resolved when the query is planned.
create or replace temp macro wb_text(v) as
    case when typeof(v) = 'VARCHAR' then nullif(trim(cast(v as varchar)), '') else wb_code(v) end
