-- Staged rows of the requested waves ($waves, in spec order), ordered by wave then respondent id.
select wave, respondent_id
    {%- for c in columns %}, {{ c|ident }}{% endfor %}
from responses
where list_contains($waves, wave)
order by list_position($waves, wave), respondent_id
