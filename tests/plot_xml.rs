//! A minimal XML well-formedness checker and tree, for the plot tests.
//!
//! It follows the well-formedness rules of XML 1.0 (W3C Recommendation, fifth edition) that
//! matter for generated SVG: one root element; start and end tags match; attribute names are
//! unique within a tag and values are quoted; `<` never appears in text or attribute values;
//! `&` only starts one of the five predefined entities or a character reference; comments,
//! processing instructions and the XML declaration are skipped. DTDs and CDATA sections are
//! rejected (the plots never write them). Entities are decoded in the tree it returns.
//!
//! Other test files include it with `#[path = "plot_xml.rs"] mod plot_xml;`.
#![allow(dead_code)]

/// An element: name, attributes in document order, child elements, and its own text
/// (decoded, concatenated across its direct text nodes).
#[derive(Debug, Clone, PartialEq)]
pub struct Element {
    pub name: String,
    pub attrs: Vec<(String, String)>,
    pub children: Vec<Element>,
    pub text: String,
}

impl Element {
    /// An attribute's value.
    pub fn attr(&self, key: &str) -> Option<&str> {
        self.attrs
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.as_str())
    }

    /// An attribute parsed as `f64`; panics with the element's name if absent or not a number.
    pub fn num(&self, key: &str) -> f64 {
        let v = self
            .attr(key)
            .unwrap_or_else(|| panic!("<{}> has no attribute {key}", self.name));
        v.parse()
            .unwrap_or_else(|_| panic!("<{}> {key}={v:?} is not a number", self.name))
    }

    /// Whether the `class` attribute lists `class`.
    pub fn has_class(&self, class: &str) -> bool {
        self.attr("class")
            .is_some_and(|c| c.split_whitespace().any(|t| t == class))
    }

    /// This element and all its descendants, in document order.
    pub fn descendants(&self) -> Vec<&Element> {
        let mut out = vec![self];
        for c in &self.children {
            out.extend(c.descendants());
        }
        out
    }

    /// Every descendant (or self) with class `class` (several space-separated classes: all
    /// of them).
    pub fn by_class(&self, class: &str) -> Vec<&Element> {
        self.descendants()
            .into_iter()
            .filter(|e| class.split_whitespace().all(|c| e.has_class(c)))
            .collect()
    }

    /// The only element with class `class`; panics if there is not exactly one.
    pub fn one(&self, class: &str) -> &Element {
        let v = self.by_class(class);
        assert_eq!(
            v.len(),
            1,
            "expected one element of class {class}, found {}",
            v.len()
        );
        v[0]
    }

    /// First descendant (or self) named `name`.
    pub fn first(&self, name: &str) -> Option<&Element> {
        self.descendants().into_iter().find(|e| e.name == name)
    }

    /// All text of this element and its descendants, in document order.
    pub fn all_text(&self) -> String {
        let mut s = self.text.clone();
        for c in &self.children {
            s.push_str(&c.all_text());
        }
        s
    }
}

struct Parser<'a> {
    s: &'a str,
    pos: usize,
}

fn is_name_start(c: char) -> bool {
    c.is_alphabetic() || c == '_' || c == ':'
}

fn is_name_char(c: char) -> bool {
    is_name_start(c) || c.is_ascii_digit() || c == '-' || c == '.'
}

impl<'a> Parser<'a> {
    fn rest(&self) -> &'a str {
        &self.s[self.pos..]
    }

    fn err<T>(&self, what: &str) -> Result<T, String> {
        Err(format!("byte {}: {what}", self.pos))
    }

    fn eat(&mut self, t: &str) -> bool {
        if self.rest().starts_with(t) {
            self.pos += t.len();
            true
        } else {
            false
        }
    }

    fn skip_ws(&mut self) {
        while let Some(c) = self.rest().chars().next() {
            if c.is_whitespace() {
                self.pos += c.len_utf8();
            } else {
                break;
            }
        }
    }

    fn skip_until(&mut self, end: &str, what: &str) -> Result<(), String> {
        match self.rest().find(end) {
            Some(i) => {
                self.pos += i + end.len();
                Ok(())
            }
            None => self.err(what),
        }
    }

    /// Comments and processing instructions (and whitespace) between markup.
    fn skip_misc(&mut self) -> Result<(), String> {
        loop {
            self.skip_ws();
            if self.eat("<!--") {
                self.skip_until("-->", "unclosed comment")?;
            } else if self.rest().starts_with("<?") {
                self.pos += 2;
                self.skip_until("?>", "unclosed processing instruction")?;
            } else {
                return Ok(());
            }
        }
    }

    fn name(&mut self) -> Result<String, String> {
        let mut chars = self.rest().char_indices();
        match chars.next() {
            Some((_, c)) if is_name_start(c) => {}
            _ => return self.err("expected a name"),
        }
        let end = chars
            .find(|(_, c)| !is_name_char(*c))
            .map_or(self.rest().len(), |(i, _)| i);
        let n = self.rest()[..end].to_string();
        self.pos += end;
        Ok(n)
    }

    fn element(&mut self) -> Result<Element, String> {
        if !self.eat("<") {
            return self.err("expected '<'");
        }
        let name = self.name()?;
        let mut attrs: Vec<(String, String)> = Vec::new();
        loop {
            let had_ws = {
                let p = self.pos;
                self.skip_ws();
                self.pos > p
            };
            if self.eat("/>") {
                return Ok(Element {
                    name,
                    attrs,
                    children: vec![],
                    text: String::new(),
                });
            }
            if self.eat(">") {
                break;
            }
            if !had_ws {
                return self.err("expected whitespace before an attribute");
            }
            let k = self.name()?;
            self.skip_ws();
            if !self.eat("=") {
                return self.err("expected '=' after attribute name");
            }
            self.skip_ws();
            let q = match self.rest().chars().next() {
                Some(q @ ('"' | '\'')) => q,
                _ => return self.err("attribute value must be quoted"),
            };
            self.pos += 1;
            let end = match self.rest().find(q) {
                Some(i) => i,
                None => return self.err("unclosed attribute value"),
            };
            let raw = &self.rest()[..end];
            if raw.contains('<') {
                return self.err("'<' in attribute value");
            }
            let v = decode(raw).map_err(|e| format!("byte {}: {e}", self.pos))?;
            self.pos += end + 1;
            if attrs.iter().any(|(a, _)| *a == k) {
                return self.err(&format!("duplicate attribute {k}"));
            }
            attrs.push((k, v));
        }
        let mut children = Vec::new();
        let mut text = String::new();
        loop {
            if self.eat("</") {
                let end = self.name()?;
                if end != name {
                    return self.err(&format!("</{end}> closes <{name}>"));
                }
                self.skip_ws();
                if !self.eat(">") {
                    return self.err("expected '>' in end tag");
                }
                return Ok(Element {
                    name,
                    attrs,
                    children,
                    text,
                });
            }
            if self.eat("<!--") {
                self.skip_until("-->", "unclosed comment")?;
                continue;
            }
            if self.rest().starts_with("<![CDATA[") || self.rest().starts_with("<!") {
                return self.err("CDATA / declarations are not expected");
            }
            if self.rest().starts_with("<?") {
                self.pos += 2;
                self.skip_until("?>", "unclosed processing instruction")?;
                continue;
            }
            if self.rest().starts_with('<') {
                children.push(self.element()?);
                continue;
            }
            let end = match self.rest().find('<') {
                Some(i) => i,
                None => return self.err(&format!("unclosed element <{name}>")),
            };
            let raw = &self.rest()[..end];
            if raw.contains("]]>") {
                return self.err("']]>' in text");
            }
            text.push_str(&decode(raw).map_err(|e| format!("byte {}: {e}", self.pos))?);
            self.pos += end;
        }
    }
}

/// Decode the predefined entities and character references; reject a bare `&`.
fn decode(raw: &str) -> Result<String, String> {
    let mut out = String::with_capacity(raw.len());
    let mut rest = raw;
    while let Some(i) = rest.find('&') {
        out.push_str(&rest[..i]);
        rest = &rest[i + 1..];
        let end = rest.find(';').ok_or("'&' without ';'")?;
        let ent = &rest[..end];
        let c = match ent {
            "lt" => '<',
            "gt" => '>',
            "amp" => '&',
            "quot" => '"',
            "apos" => '\'',
            _ if ent.starts_with("#x") => u32::from_str_radix(&ent[2..], 16)
                .ok()
                .and_then(char::from_u32)
                .ok_or(format!("bad character reference &{ent};"))?,
            _ if ent.starts_with('#') => ent[1..]
                .parse::<u32>()
                .ok()
                .and_then(char::from_u32)
                .ok_or(format!("bad character reference &{ent};"))?,
            _ => return Err(format!("unknown entity &{ent};")),
        };
        out.push(c);
        rest = &rest[end + 1..];
    }
    out.push_str(rest);
    Ok(out)
}

/// Check that `doc` is a well-formed XML document and return its root element.
pub fn parse(doc: &str) -> Result<Element, String> {
    if let Some((i, c)) = doc
        .char_indices()
        .find(|(_, c)| (*c as u32) < 0x20 && !matches!(c, '\t' | '\n' | '\r'))
    {
        return Err(format!("byte {i}: control character U+{:04X}", c as u32));
    }
    let mut p = Parser { s: doc, pos: 0 };
    p.skip_misc()?;
    if p.rest().starts_with("<!") {
        return p.err("DTDs are not expected");
    }
    let root = p.element()?;
    p.skip_misc()?;
    if p.pos != doc.len() {
        return p.err("content after the root element");
    }
    Ok(root)
}

#[test]
fn accepts_well_formed_and_decodes() {
    let e = parse("<?xml version=\"1.0\"?>\n<a x='1' y=\"&lt;&amp;&gt;\"><!-- c --><b/>t&#65;&#x42;<c>u</c></a>\n")
        .unwrap();
    assert_eq!(e.name, "a");
    assert_eq!(e.attr("y"), Some("<&>"));
    assert_eq!(e.children.len(), 2);
    assert_eq!(e.text, "tAB");
    assert_eq!(e.all_text(), "tABu");
}

#[test]
fn rejects_malformed() {
    // Each violates one XML 1.0 well-formedness constraint.
    for bad in [
        "<a><b></a></b>",       // element type match
        "<a x=\"1\" x=\"2\"/>", // unique attribute specification
        "<a x=1/>",             // attribute values are quoted
        "<a>1 < 2</a>",         // no '<' in character data
        "<a>fish & chips</a>",  // '&' only as a reference
        "<a x=\"<\"/>",         // no '<' in attribute values
        "<a/><b/>",             // exactly one root element
        "<a>",                  // unclosed element
        "<a>&bogus;</a>",       // undeclared entity
        "<a x=\"1\"y=\"2\"/>",  // whitespace between attributes
        "<a>\u{1}</a>",         // character range
    ] {
        assert!(parse(bad).is_err(), "accepted {bad:?}");
    }
}
