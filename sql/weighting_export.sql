-- Final weights of the requested waves ($waves, in spec order) for export.
select respondent_id, wave, weight
from weights
where list_contains($waves, wave)
order by list_position($waves, wave), respondent_id
