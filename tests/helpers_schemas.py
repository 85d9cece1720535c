"""A shared XML Schema of invented bike-share rides, for the schema-file and XML reader tests."""

RIDES_XSD = """
    <?xml version="1.0" encoding="UTF-8"?>
    <xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema">
      <xs:element name="rides">
        <xs:complexType><xs:sequence>
          <xs:element name="exported" type="xs:dateTime"/>
          <xs:element name="ride" minOccurs="0" maxOccurs="unbounded">
            <xs:complexType>
              <xs:sequence>
                <xs:element name="started_at" type="xs:dateTime"/>
                <xs:element name="zone" type="xs:string" minOccurs="0"/>
                <xs:element name="fare">
                  <xs:simpleType><xs:restriction base="xs:string">
                    <xs:enumeration value="member"/><xs:enumeration value="casual"/>
                  </xs:restriction></xs:simpleType>
                </xs:element>
                <xs:element name="amount">
                  <xs:simpleType><xs:restriction base="xs:decimal">
                    <xs:totalDigits value="10"/><xs:fractionDigits value="2"/>
                    <xs:minInclusive value="0"/><xs:maxExclusive value="500"/>
                  </xs:restriction></xs:simpleType>
                </xs:element>
                <xs:element name="day" type="xs:date" nillable="true"/>
                <xs:element name="docks" type="xs:unsignedShort"/>
                <xs:element name="electric" type="xs:boolean"/>
                <xs:element name="km" type="xs:double"/>
                <xs:choice>
                  <xs:element name="card" type="xs:token"/>
                  <xs:element name="voucher" type="xs:positiveInteger"/>
                </xs:choice>
              </xs:sequence>
              <xs:attribute name="id" use="required">
                <xs:simpleType><xs:restriction base="xs:string"><xs:pattern value="R\\d{7}"/></xs:restriction>
                </xs:simpleType>
              </xs:attribute>
              <xs:attribute name="station">
                <xs:simpleType><xs:restriction base="xs:string"><xs:maxLength value="4"/></xs:restriction>
                </xs:simpleType>
              </xs:attribute>
            </xs:complexType>
          </xs:element>
        </xs:sequence></xs:complexType>
      </xs:element>
    </xs:schema>
"""
