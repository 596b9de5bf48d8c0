-- wb_value(v): a raw value as the value counts keep it (wb_values): text exactly as written, and
-- a number of a typed column as its integer code (typed code columns hold whole numbers only).
create or replace temp macro wb_value(v) as
    case when typeof(v) = 'VARCHAR' then cast(v as varchar) else wb_code(v) end
