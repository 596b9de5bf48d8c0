-- Rebuild an older `weights` table without its primary key, step 1: copy every row.
create table __wavebook_weights_rebuilt as select wave, respondent_id, weight from weights
