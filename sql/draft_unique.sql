-- Whether a column could be the respondent id: no empty value and no value repeated.
select count(*) = count(wb_text({{ column|ident }}))
    and count(wb_text({{ column|ident }})) = count(distinct wb_text({{ column|ident }}))
from {{ raw|ident }}
