-- Whether a column could be the respondent id: no empty value and no value repeated.
select count(*) = count({{ column|ident }}) and count({{ column|ident }}) = count(distinct {{ column|ident }})
from {{ raw|ident }}
