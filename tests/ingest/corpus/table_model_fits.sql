INSERT INTO model_fits (fit_id, subject_id, model, status) VALUES (1, 'MKT', 'premium', 'ok');
