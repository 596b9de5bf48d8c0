-- wb_code(v): a raw value in the form integer codes are compared in ('3.0' and '03' -> '3', and
-- the number 3.0 of a typed column -> '3'); text that is not a whole number is returned unchanged.
create or replace temp macro wb_code(v) as
    case
        when wb_number(v) = trunc(wb_number(v)) and abs(wb_number(v)) < 1e15
            then cast(cast(wb_number(v) as bigint) as varchar)
        else cast(v as varchar)
    end
