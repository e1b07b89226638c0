//! The adapter's command line: split into words like a POSIX shell would, without running a shell.

/// Splits a command line into words like a POSIX shell does for quoting, without running a shell:
/// whitespace separates words, `'...'` is literal, `"..."` allows `\"`, `\\`, `\$`, `` \` ``, and a
/// backslash outside quotes escapes the next character. No expansion of variables, globs or `~`.
pub fn split_command(line: &str) -> Result<Vec<String>, String> {
    let mut words = Vec::new();
    let mut cur = String::new();
    let mut in_word = false;
    let mut chars = line.chars();
    while let Some(c) = chars.next() {
        match c {
            c if c.is_whitespace() => {
                if in_word {
                    words.push(std::mem::take(&mut cur));
                    in_word = false;
                }
            }
            '\'' => {
                in_word = true;
                single_quoted(&mut chars, &mut cur)
                    .ok_or_else(|| format!("unterminated single quote in `{line}`"))?;
            }
            '"' => {
                in_word = true;
                double_quoted(&mut chars, &mut cur)
                    .ok_or_else(|| format!("unterminated double quote in `{line}`"))?;
            }
            '\\' => {
                in_word = true;
                match chars.next() {
                    Some('\n') => {}
                    Some(ch) => cur.push(ch),
                    None => return Err(format!("a trailing backslash in `{line}`")),
                }
            }
            c => {
                in_word = true;
                cur.push(c);
            }
        }
    }
    if in_word {
        words.push(cur);
    }
    Ok(words)
}

/// The rest of a `'...'` word; `None` when the quote is not closed.
fn single_quoted(chars: &mut std::str::Chars<'_>, cur: &mut String) -> Option<()> {
    loop {
        match chars.next()? {
            '\'' => return Some(()),
            ch => cur.push(ch),
        }
    }
}

/// The rest of a `"..."` word; `None` when the quote is not closed.
fn double_quoted(chars: &mut std::str::Chars<'_>, cur: &mut String) -> Option<()> {
    loop {
        match chars.next()? {
            '"' => return Some(()),
            '\\' => match chars.next()? {
                ch @ ('"' | '\\' | '$' | '`') => cur.push(ch),
                '\n' => {}
                ch => {
                    cur.push('\\');
                    cur.push(ch);
                }
            },
            ch => cur.push(ch),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splits_like_a_shell() {
        // POSIX shell quoting rules (IEEE Std 1003.1-2017, Shell Command Language, 2.2 Quoting).
        let w = split_command(r#"python3  'my dir/a.py' "x \"y\" \$z" a\ b --k=v"#).unwrap();
        assert_eq!(
            w,
            vec!["python3", "my dir/a.py", r#"x "y" $z"#, "a b", "--k=v"]
        );
        assert_eq!(split_command("a ''").unwrap(), vec!["a", ""]);
        assert_eq!(split_command("   ").unwrap(), Vec::<String>::new());
        assert!(split_command("a 'b").is_err());
        assert!(split_command("a \"b").is_err());
        assert!(split_command("a \\").is_err());
    }
}
